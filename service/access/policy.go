// Package access decides who may do what in genvelope: the access file
// (identities and their grants of roles over sites and units), the
// identity of a caller (a client certificate's subject or SAN, or a
// basic-auth user), the rights check on every call and every sample,
// and the audit of denials and operator actions.
//
// Without an access file every caller may do everything (the service
// as it was); with one, everything not granted is denied.
package access

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"

	"go.yaml.in/yaml/v3"
)

// Role is what a grant lets an identity do.
type Role uint8

// The roles. An operator may also read the units it operates.
const (
	TelemetryWriter Role = iota // push samples for its units
	Operator                    // acknowledge, shelve, unshelve, resets for its units
	Viewer                      // read: pages, metrics, fleet and alarm queries, for its units
	Admin                       // reload, access changes, profiling
	NumRoles
)

var roleNames = [NumRoles]string{"telemetry_writer", "operator", "viewer", "admin"}

func (r Role) String() string {
	if r < NumRoles {
		return roleNames[r]
	}
	return fmt.Sprintf("Role(%d)", uint8(r))
}

// ParseRole returns the role named s.
func ParseRole(s string) (Role, bool) {
	for i, n := range roleNames {
		if n == s {
			return Role(i), true
		}
	}
	return 0, false
}

// Grant is one role over the units whose site matches one of Sites and
// whose id matches one of Units (an empty list matches everything).
// Patterns use * (any run of characters) and ? (one character).
type Grant struct {
	Role  Role
	Sites []string
	Units []string
}

// Policy is a parsed access file.
type Policy struct {
	// byName maps an identity's name to its grants.
	byName map[string][]Grant
}

// Names returns how many identities the policy has.
func (p *Policy) Len() int { return len(p.byName) }

// MaxFileBytes bounds the access file.
const MaxFileBytes = 1 << 20

// LoadFile reads and checks an access file.
func LoadFile(path string) (*Policy, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("access file: %w", err)
	}
	defer f.Close()
	data, err := io.ReadAll(io.LimitReader(f, MaxFileBytes+1))
	if err != nil {
		return nil, fmt.Errorf("access file %s: %w", path, err)
	}
	p, err := Parse(data)
	if err != nil {
		return nil, fmt.Errorf("access file %s:%w", path, err)
	}
	return p, nil
}

// file is the YAML layout of an access file.
type file struct {
	Identities []identity `yaml:"identities"`
}

type identity struct {
	Name   string      `yaml:"name"`
	Grants []grantYAML `yaml:"grants"`
	line   int
}

// checkKeys refuses a mapping key not in allowed (node.Decode does not
// apply the decoder's KnownFields).
func checkKeys(n *yaml.Node, allowed ...string) error {
	if n.Kind != yaml.MappingNode {
		return nil
	}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k := n.Content[i]
		ok := false
		for _, a := range allowed {
			ok = ok || k.Value == a
		}
		if !ok {
			return fmt.Errorf("line %d: unknown key %q (allowed: %s)", k.Line, clip(k.Value), strings.Join(allowed, ", "))
		}
	}
	return nil
}

func (id *identity) UnmarshalYAML(n *yaml.Node) error {
	if err := checkKeys(n, "name", "grants"); err != nil {
		return err
	}
	type plain identity
	var p plain
	if err := n.Decode(&p); err != nil {
		return err
	}
	*id = identity(p)
	id.line = n.Line
	return nil
}

type grantYAML struct {
	Role  string   `yaml:"role"`
	Sites []string `yaml:"sites"`
	Units []string `yaml:"units"`
	line  int
}

func (g *grantYAML) UnmarshalYAML(n *yaml.Node) error {
	if err := checkKeys(n, "role", "sites", "units"); err != nil {
		return err
	}
	type plain grantYAML
	var p plain
	if err := n.Decode(&p); err != nil {
		return err
	}
	*g = grantYAML(p)
	g.line = n.Line
	return nil
}

// maxPattern bounds a name or pattern, in bytes.
const maxPattern = 256

// Parse checks an access file's content and lists every problem at once
// as " LINE: what is wrong" lines (the caller puts the file name first).
func Parse(data []byte) (*Policy, error) {
	if len(data) > MaxFileBytes {
		return nil, fmt.Errorf(" the file is larger than %d bytes", MaxFileBytes)
	}
	var f file
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(&f); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, errors.New(" the file is empty: it needs an identities: list")
		}
		return nil, fmt.Errorf(" %s", strings.TrimPrefix(err.Error(), "yaml: "))
	}
	var probs []string
	bad := func(line int, format string, args ...any) {
		probs = append(probs, fmt.Sprintf("%d: %s", line, fmt.Sprintf(format, args...)))
	}
	p := &Policy{byName: map[string][]Grant{}}
	seen := map[string]int{}
	for _, id := range f.Identities {
		switch {
		case id.Name == "":
			bad(id.line, "identity without a name (a client certificate's subject CN or SAN, or a basic-auth user)")
			continue
		case !printable(id.Name) || len(id.Name) > maxPattern:
			bad(id.line, "identity name %q: printable, at most %d bytes", clip(id.Name), maxPattern)
			continue
		}
		if l, dup := seen[id.Name]; dup {
			bad(id.line, "identity %q is already given at line %d", id.Name, l)
			continue
		}
		seen[id.Name] = id.line
		if len(id.Grants) == 0 {
			bad(id.line, "identity %q has no grants", id.Name)
		}
		var gs []Grant
		for _, g := range id.Grants {
			r, ok := ParseRole(g.Role)
			if !ok {
				bad(g.line, "identity %q: role %q is not one of %s", id.Name, clip(g.Role), strings.Join(roleNames[:], ", "))
				continue
			}
			okPat := true
			for _, pat := range append(append([]string(nil), g.Sites...), g.Units...) {
				if pat == "" || !printable(pat) || len(pat) > maxPattern {
					bad(g.line, "identity %q: pattern %q: non-empty, printable, at most %d bytes", id.Name, clip(pat), maxPattern)
					okPat = false
				}
			}
			if !okPat {
				continue
			}
			gs = append(gs, Grant{Role: r, Sites: g.Sites, Units: g.Units})
		}
		p.byName[id.Name] = gs
	}
	if len(probs) > 0 {
		return nil, errors.New(strings.Join(probs, "\n"))
	}
	return p, nil
}

func printable(s string) bool {
	for _, r := range s {
		if r < 0x20 || r == 0x7f || r == 0xfffd {
			return false
		}
	}
	return true
}

func clip(s string) string {
	if len(s) > 64 {
		return s[:64] + "…"
	}
	return s
}

// match reports whether s matches pattern, where * is any run of
// characters and ? one byte. It does not allocate.
func match(pattern, s string) bool {
	// Iterative with one backtrack point: linear in len(pattern)*len(s)
	// at worst.
	px, sx := 0, 0
	starP, starS := -1, 0
	for sx < len(s) {
		if px < len(pattern) {
			switch c := pattern[px]; c {
			case '*':
				starP, starS = px, sx
				px++
				continue
			case '?':
				px++
				sx++
				continue
			default:
				if c == s[sx] {
					px++
					sx++
					continue
				}
			}
		}
		if starP < 0 {
			return false
		}
		starS++
		px, sx = starP+1, starS
	}
	for px < len(pattern) && pattern[px] == '*' {
		px++
	}
	return px == len(pattern)
}

func matchAny(patterns []string, s string) bool {
	if len(patterns) == 0 {
		return true
	}
	for _, p := range patterns {
		if match(p, s) {
			return true
		}
	}
	return false
}

// covers reports whether g grants role over the unit id of site.
func (g *Grant) covers(role Role, unitID, site string) bool {
	if g.Role != role && !(role == Viewer && g.Role == Operator) {
		return false
	}
	return matchAny(g.Sites, site) && matchAny(g.Units, unitID)
}

// Rights are the grants of one caller under one policy.
type Rights struct {
	all    bool // no access file: everything is allowed
	grants []Grant
}

// AllowAll are the rights of every caller when there is no access file.
var allowAll = &Rights{all: true}

// Has reports whether r grants role over at least one unit (or at all,
// for Admin).
func (r *Rights) Has(role Role) bool {
	if r.all {
		return true
	}
	for i := range r.grants {
		g := &r.grants[i]
		if g.Role == role || (role == Viewer && g.Role == Operator) {
			return true
		}
	}
	return false
}

// HasAll reports whether r grants role over every unit (a grant with no
// site or unit pattern other than "*"): what fleet-wide reads (the
// overview, /metrics) need.
func (r *Rights) HasAll(role Role) bool {
	if r.all {
		return true
	}
	for i := range r.grants {
		g := &r.grants[i]
		if (g.Role == role || (role == Viewer && g.Role == Operator)) && everything(g.Sites) && everything(g.Units) {
			return true
		}
	}
	return false
}

func everything(patterns []string) bool {
	for _, p := range patterns {
		if p == "*" {
			return true
		}
	}
	return len(patterns) == 0
}

// Allows reports whether r grants role over the unit unitID of site. It
// does not allocate.
func (r *Rights) Allows(role Role, unitID, site string) bool {
	if r.all {
		return true
	}
	for i := range r.grants {
		if r.grants[i].covers(role, unitID, site) {
			return true
		}
	}
	return false
}

// rights returns the union of the grants of names.
func (p *Policy) rights(names []string) *Rights {
	if p == nil {
		return allowAll
	}
	r := &Rights{}
	for _, n := range names {
		r.grants = append(r.grants, p.byName[n]...)
	}
	return r
}

// known returns the first of names the policy has, or "".
func (p *Policy) known(names []string) string {
	for _, n := range names {
		if _, ok := p.byName[n]; ok {
			return n
		}
	}
	return ""
}
