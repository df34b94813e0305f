package fleet

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/limits"
)

// The decoder walks the yaml.Node tree itself, so that every problem gets
// the line it is on, and goes on after a problem so that all of them are
// reported at once.
//
// Adding a block: a top-level block (alarms:, ...) is an entry in
// topLevelKeys with a function that decodes it; a block inside a unit is an
// entry in unitKeys. Each decoding function opens its mapping with the keys
// it allows and reads them with the number, text and list helpers, which
// report what is missing or wrong.

type decoder struct {
	file  string
	diags Diagnostics
	units []*unitCtx
	fleet *Fleet
	paths *pathTable // see path

	workers int // goroutines for building the units (at least 1)

	// The units' text, item by item, when the file has the plain shape
	// splitUnits reads (split.go): then each unit's YAML tree is built,
	// decoded and dropped in turn, and the whole file's tree never
	// exists. splitFailed: an item did not parse alone; the file is then
	// decoded whole, which reports it as before.
	chunks      []unitChunk
	text        []byte // the file the chunks are in
	splitFailed bool
	budget      int            // YAML nodes the units may still expand to (maxNodes)
	firstLine   map[string]int // the line of each unit id's first use
}

// unitCtx is the state of decoding one unit.
type unitCtx struct {
	d     *decoder
	u     *Unit
	label string   // the unit's id, or "#n" when it has none
	bad   bool     // an error was reported for this unit
	ok    []uint64 // dotted paths of the values read without problems: a bit per path (decoder.paths)
}

// path returns the number of a dotted key path in the fleet's path
// table, adding it. Every unit's line table and "read without problems"
// set are keyed by these numbers: a fleet of 100,000 units otherwise
// holds a map of some sixty paths per unit. Only the decoding, one unit
// at a time, adds paths.
func (d *decoder) path(p string) int {
	if n, ok := d.paths.ids[p]; ok {
		return n
	}
	n := len(d.paths.ids)
	d.paths.ids[p] = n
	return n
}

// pathTable numbers the dotted key paths of a fleet file.
type pathTable struct {
	ids map[string]int
}

// keyLine is the line of the key at a path (pathTable's number).
type keyLine struct {
	path uint32
	line int32
}

// setOK records that the value at field was read without problems.
func (c *unitCtx) setOK(field string) {
	n := c.d.path(field)
	for len(c.ok) <= n/64 {
		c.ok = append(c.ok, 0)
	}
	c.ok[n/64] |= 1 << (n % 64)
}

// clearOK takes back setOK.
func (c *unitCtx) clearOK(field string) {
	if n, ok := c.d.paths.ids[field]; ok && n/64 < len(c.ok) {
		c.ok[n/64] &^= 1 << (n % 64)
	}
}

// isOK reports whether the value at field was read without problems. It
// only reads the decoder's paths, so units may be built concurrently.
func (c *unitCtx) isOK(field string) bool {
	n, ok := c.d.paths.ids[field]
	return ok && n/64 < len(c.ok) && c.ok[n/64]&(1<<(n%64)) != 0
}

// topKey is one key allowed at the top of the fleet file.
type topKey struct {
	name     string
	required bool
	decode   func(d *decoder, v *yaml.Node, line int)
}

// topLevelKeys lists the top-level blocks of a fleet file.
func topLevelKeys() []topKey {
	return []topKey{
		{name: "alarms", required: false, decode: (*decoder).decodeFleetAlarms}, // before units: their defaults
		{name: "units", required: true, decode: (*decoder).decodeUnits},
	}
}

// unitKey is one key allowed in a unit.
type unitKey struct {
	name     string
	required bool
	decode   func(c *unitCtx, v *yaml.Node, path string, line int)
}

// unitKeys lists the keys of a unit, in the order they are decoded. The id
// is decoded before these.
func unitKeys() []unitKey {
	return []unitKey{
		{name: "id", required: true, decode: nil},
		{name: "name", required: false, decode: (*unitCtx).decodeName},
		{name: "site", required: false, decode: (*unitCtx).decodeSite},
		{name: "rating", required: true, decode: (*unitCtx).decodeRating},
		{name: "machine", required: true, decode: (*unitCtx).decodeMachine},
		{name: "field", required: true, decode: (*unitCtx).decodeField},
		{name: "prime_mover", required: true, decode: (*unitCtx).decodePrimeMover},
		{name: "grid", required: false, decode: (*unitCtx).decodeGrid},
		{name: "excitation", required: false, decode: (*unitCtx).decodeExcitation},
		{name: "stabilizer", required: false, decode: (*unitCtx).decodeStabilizer},
		{name: "stability", required: false, decode: (*unitCtx).decodeStability},
		{name: "end_region", required: false, decode: (*unitCtx).decodeEndRegion},
		{name: "coolant", required: false, decode: (*unitCtx).decodeCoolant},
		{name: "protection", required: false, decode: (*unitCtx).decodeProtection},
		{name: "transformer", required: false, decode: (*unitCtx).decodeTransformer},
		{name: "alarms", required: false, decode: (*unitCtx).decodeAlarms},
		{name: "plausibility", required: false, decode: (*unitCtx).decodePlausibility},
	}
}

// maxIDLen is the longest unit id allowed.
const maxIDLen = 64

// maxNodes bounds the work of reading the units: the number of YAML
// nodes they hold, counting an alias's target each time it is used,
// beyond one node per byte of the file (a node takes at least one byte
// of text unless it is an alias's expansion, so only aliases can reach
// the bound, whatever the fleet's size).
const maxNodes = 1_000_000

// countNodes counts the nodes under n, aliases expanded, stopping once the
// count exceeds limit.
func countNodes(n *yaml.Node, limit int) int {
	count := 0
	var walk func(n *yaml.Node, depth int)
	walk = func(n *yaml.Node, depth int) {
		if count > limit || n == nil || depth > 100 {
			return
		}
		count++
		if n.Kind == yaml.AliasNode {
			walk(n.Alias, depth+1)
			return
		}
		for _, c := range n.Content {
			walk(c, depth+1)
		}
	}
	walk(n, 0)
	return count
}

// maxPoles is the largest number of poles allowed.
const maxPoles = 1000

func (d *decoder) add(sev Severity, line int, unitID, field, format string, args ...any) {
	d.diags = append(d.diags, Diagnostic{
		File: d.file, Line: line, UnitID: unitID, Field: field,
		Message: fmt.Sprintf(format, args...), Severity: sev,
	})
}

func (d *decoder) errorf(line int, field, format string, args ...any) {
	d.add(Error, line, "", field, format, args...)
}

func (c *unitCtx) errorf(line int, field, format string, args ...any) {
	c.bad = true
	c.d.add(Error, line, c.label, field, format, args...)
}

func (c *unitCtx) warnf(line int, field, format string, args ...any) {
	c.d.add(Warning, line, c.label, field, format, args...)
}

// document decodes the whole file into f: unit by unit when splitUnits
// can split it, else as one tree.
func (d *decoder) document(data []byte, f *Fleet) {
	if skeleton, chunks, ok := splitUnits(data); ok {
		saved := *f
		d.chunks, d.text = chunks, data
		d.tree(skeleton, data, f)
		if !d.splitFailed {
			return
		}
		*f = saved
		f.byID = map[string]*Unit{}
		d.diags, d.units, d.chunks, d.text = nil, nil, nil, nil
	}
	d.tree(data, data, f)
}

// tree decodes the YAML document in data (the file itself, or its
// skeleton: the file with the units' items blanked) into f.
func (d *decoder) tree(data, file []byte, f *Fleet) {
	d.fleet = f
	d.paths = &pathTable{ids: map[string]int{}}
	d.budget = maxNodes + len(file)
	d.firstLine = map[string]int{}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var doc yaml.Node
	err := dec.Decode(&doc)
	if errors.Is(err, io.EOF) {
		d.errorf(0, "", "the file is empty; it needs a units: list")
		return
	}
	if err != nil {
		line, msg := yamlError(err)
		d.errorf(line, "", "not valid YAML (at or near this line): %s", msg)
		return
	}
	var extra yaml.Node
	if err := dec.Decode(&extra); err == nil {
		d.errorf(extra.Line, "", "a fleet file holds one YAML document; a second one starts here (remove the '---')")
	} else if !errors.Is(err, io.EOF) {
		line, msg := yamlError(err)
		d.errorf(line, "", "not valid YAML after the first document: %s", msg)
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) != 1 {
		d.errorf(doc.Line, "", "the file must hold a mapping with a units: list")
		return
	}
	root := resolve(doc.Content[0])
	if root.Kind == yaml.ScalarNode && root.Tag == "!!null" {
		d.errorf(0, "", "the file is empty; it needs a units: list")
		return
	}
	keys := topLevelKeys()
	allowed := make([]string, len(keys))
	for i, k := range keys {
		allowed[i] = k.name
	}
	m, ok := openMapping(root, root.Line, "", allowed, d.errorf, nil)
	if !ok {
		return
	}
	for _, k := range keys {
		v, line, present := m.get(k.name)
		if !present {
			if k.required {
				d.errorf(m.line, k.name, "missing; a fleet file needs a %s: list", k.name)
			}
			continue
		}
		k.decode(d, v, line)
	}
}

// yamlError splits a yaml parser error into a line and a message.
func yamlError(err error) (int, string) {
	msg := strings.TrimPrefix(err.Error(), "yaml: ")
	var line int
	if _, e := fmt.Sscanf(msg, "line %d:", &line); e == nil {
		if i := strings.Index(msg, ": "); i >= 0 {
			msg = msg[i+2:]
		}
	}
	return line, msg
}

// resolve follows aliases to the node they name.
func resolve(n *yaml.Node) *yaml.Node {
	for i := 0; n != nil && n.Kind == yaml.AliasNode && i < 100; i++ {
		n = n.Alias
	}
	if n == nil {
		return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!null"}
	}
	return n
}

// describe names what a node holds, for messages.
func describe(n *yaml.Node) string {
	switch n.Kind {
	case yaml.MappingNode:
		return "a mapping"
	case yaml.SequenceNode:
		return "a list"
	case yaml.ScalarNode:
		switch n.Tag {
		case "!!null":
			return "nothing"
		case "!!str":
			return strconv.Quote(clip(n.Value))
		case "!!bool":
			return "the boolean " + n.Value
		}
		return clip(n.Value)
	}
	return "something else"
}

// clip shortens long text for messages.
func clip(s string) string {
	const maxLen = 40
	if len(s) <= maxLen {
		return s
	}
	return strings.ToValidUTF8(s[:maxLen], "") + "..."
}

// join appends key to a dotted path.
func join(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

// mapping is an opened YAML mapping whose keys have been checked.
type mapping struct {
	path    string // dotted path of the mapping ("" at the top of the file or of a unit)
	line    int    // line of the key holding the mapping
	entries []mappingEntry
}

// mappingEntry is one key of a mapping. A mapping has a few keys: a
// list searched in order costs less than two maps per mapping (a unit
// opens a dozen mappings; a fleet of 100,000 units, a million).
type mappingEntry struct {
	key  string
	val  *yaml.Node
	line int
}

// get returns the value of key, the line of the key, and whether it is present.
func (m *mapping) get(key string) (*yaml.Node, int, bool) {
	for i := range m.entries {
		if e := &m.entries[i]; e.key == key {
			return e.val, e.line, true
		}
	}
	return nil, m.line, false
}

// has reports whether key is present.
func (m *mapping) has(key string) bool {
	_, _, ok := m.get(key)
	return ok
}

// openMapping checks that n is a mapping whose keys are all in allowed and
// appear once, reporting through errf. lines, when not nil, receives the
// line of every key by dotted path.
func openMapping(n *yaml.Node, line int, path string, allowed []string, errf func(int, string, string, ...any), lines func(field string, line int)) (*mapping, bool) {
	n = resolve(n)
	if n.Kind != yaml.MappingNode {
		what := "the file"
		if path != "" {
			what = "it"
		}
		errf(line, path, "%s must be a mapping with the keys %s; got %s", what, strings.Join(allowed, ", "), describe(n))
		return nil, false
	}
	m := &mapping{path: path, line: line, entries: make([]mappingEntry, 0, len(n.Content)/2)}
	for i := 0; i+1 < len(n.Content); i += 2 {
		kn, vn := resolve(n.Content[i]), n.Content[i+1]
		if kn.Kind != yaml.ScalarNode || kn.Tag == "!!null" {
			errf(kn.Line, path, "keys must be plain names; got %s (allowed keys: %s)", describe(kn), strings.Join(allowed, ", "))
			continue
		}
		key := kn.Value
		field := join(path, key)
		if !contains(allowed, key) {
			if key == "<<" {
				errf(kn.Line, path, "merge keys (<<) are not supported; write the keys out (allowed keys: %s)", strings.Join(allowed, ", "))
			} else {
				errf(kn.Line, field, "unknown key; allowed keys here: %s", strings.Join(allowed, ", "))
			}
			continue
		}
		if _, first, dup := m.get(key); dup {
			errf(kn.Line, field, "given twice; it was already given on line %d", first)
			continue
		}
		m.entries = append(m.entries, mappingEntry{key, vn, kn.Line})
		if lines != nil {
			lines(field, kn.Line)
		}
	}
	// An unknown or repeated key is reported; the known keys are still read.
	return m, true
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// open opens the mapping of a unit block, recording key lines.
func (c *unitCtx) open(v *yaml.Node, path string, line int, allowed ...string) (*mapping, bool) {
	return openMapping(v, line, path, allowed, c.errorf, c.line)
}

// line records the line of the key at field.
func (c *unitCtx) line(field string, line int) {
	c.u.setLine(c.d.path(field), line)
}

// number reads the number at key. rule checks the value and returns ""
// when it is allowed, else what is allowed. what says what the number is,
// for the message when a required number is missing. ok is false when the
// key is absent or its value wrong (which is reported).
func (c *unitCtx) number(m *mapping, key string, required bool, what string, rule func(float64) string) (float64, bool) {
	field := join(m.path, key)
	v, line, present := m.get(key)
	if !present {
		if required {
			c.errorf(line, field, "missing; give %s", what)
		}
		return 0, false
	}
	x, ok := c.scalarNumber(v, line, field, what)
	if !ok {
		return 0, false
	}
	if rule != nil {
		if msg := rule(x); msg != "" {
			c.errorf(line, field, "%s, got %s", msg, clip(resolve(v).Value))
			return 0, false
		}
	}
	c.setOK(field)
	return x, true
}

// scalarNumber converts a YAML scalar to a finite float64.
func (c *unitCtx) scalarNumber(v *yaml.Node, line int, field, what string) (float64, bool) {
	n := resolve(v)
	if n.Kind == yaml.ScalarNode && (n.Tag == "!!int" || n.Tag == "!!float") {
		var x float64
		if err := n.Decode(&x); err != nil {
			c.errorf(line, field, "must be a number (%s); got %s", what, describe(n))
			return 0, false
		}
		if math.IsNaN(x) || math.IsInf(x, 0) {
			c.errorf(line, field, "must be a finite number (%s); got %s", what, clip(n.Value))
			return 0, false
		}
		return x, true
	}
	if n.Kind == yaml.ScalarNode && n.Tag == "!!str" && n.Style == 0 {
		if _, err := strconv.ParseFloat(n.Value, 64); err != nil && errors.Is(err, strconv.ErrRange) {
			c.errorf(line, field, "must be a finite number (%s); %s is out of range", what, clip(n.Value))
			return 0, false
		}
	}
	hint := ""
	if n.Kind == yaml.ScalarNode && n.Tag == "!!str" && n.Style != 0 {
		if _, err := strconv.ParseFloat(n.Value, 64); err == nil {
			hint = " (remove the quotes)"
		}
	}
	c.errorf(line, field, "must be a number (%s); got %s%s", what, describe(n), hint)
	return 0, false
}

// text reads a plain scalar at key as text.
func (c *unitCtx) text(m *mapping, key string, required bool, what string) (string, bool) {
	field := join(m.path, key)
	v, line, present := m.get(key)
	if !present {
		if required {
			c.errorf(line, field, "missing; give %s", what)
		}
		return "", false
	}
	n := resolve(v)
	if n.Kind != yaml.ScalarNode || n.Tag == "!!null" {
		c.errorf(line, field, "must be text (%s); got %s", what, describe(n))
		return "", false
	}
	c.setOK(field)
	return n.Value, true
}

// list reads the list at key.
// openItem opens item n (0-based index i) of the list at field as a
// mapping with the allowed keys, recording its line under its path
// (field[i+1]); ok is false, and the problem reported, when it is not one.
func (c *unitCtx) openItem(n *yaml.Node, field string, i int, keys ...string) (m *mapping, itemPath string, ok bool) {
	itemPath = fmt.Sprintf("%s[%d]", field, i+1)
	c.line(itemPath, n.Line)
	m, ok = c.open(n, itemPath, n.Line, keys...)
	return m, itemPath, ok
}

func (c *unitCtx) list(m *mapping, key string, required bool, what string) ([]*yaml.Node, int, bool) {
	field := join(m.path, key)
	v, line, present := m.get(key)
	if !present {
		if required {
			c.errorf(line, field, "missing; give %s", what)
		}
		return nil, line, false
	}
	n := resolve(v)
	if n.Kind != yaml.SequenceNode {
		c.errorf(line, field, "must be a list (%s); got %s", what, describe(n))
		return nil, line, false
	}
	return n.Content, line, true
}

// Rules for numbers; each returns "" when x is allowed.

func positive(x float64) string {
	if x > 0 {
		return ""
	}
	return "must be positive"
}

func nonNegative(x float64) string {
	if x >= 0 {
		return ""
	}
	return "must not be negative"
}

func fmtNum(x float64) string { return strconv.FormatFloat(x, 'g', -1, 64) }

// decodeUnits decodes the units: list.
func (d *decoder) decodeUnits(v *yaml.Node, line int) {
	if d.chunks != nil {
		d.decodeChunks()
		return
	}
	n := resolve(v)
	if n.Kind != yaml.SequenceNode {
		d.errorf(line, "units", "must be a list of units; got %s", describe(n))
		return
	}
	if len(n.Content) == 0 {
		d.errorf(line, "units", "the list is empty; a fleet file needs at least one unit")
		return
	}
	for i, item := range n.Content {
		if !d.unitItem(i, item) {
			return
		}
	}
}

// unitItem decodes the i-th item of the units: list and adds the unit
// to the fleet. It returns false when the units' YAML nodes exceed the
// budget: the rest of the file is not read.
func (d *decoder) unitItem(i int, item *yaml.Node) bool {
	if d.budget -= countNodes(item, d.budget); d.budget < 0 {
		d.errorf(item.Line, "units", "the units expand to more than %d YAML nodes beyond one per byte of the file (aliases are counted each time they are used); the rest of the file is not read", maxNodes)
		return false
	}
	c := d.decodeUnit(i, item)
	if c == nil {
		return true
	}
	d.units = append(d.units, c)
	if c.u.ID == "" {
		return true
	}
	if first, dup := d.firstLine[c.u.ID]; dup {
		c.errorf(c.u.Line("id"), "id", "duplicate id; it is already used by the unit on line %d (ids must be unique)", first)
		return true
	}
	d.firstLine[c.u.ID] = c.u.Line("id")
	d.fleet.Units = append(d.fleet.Units, c.u)
	d.fleet.byID[c.u.ID] = c.u
	return true
}

// decodeUnit decodes the i-th unit of the list.
func (d *decoder) decodeUnit(i int, item *yaml.Node) *unitCtx {
	n := resolve(item)
	label := fmt.Sprintf("#%d", i+1)
	if n.Kind != yaml.MappingNode {
		d.add(Error, item.Line, label, "", "each entry of units: must be a mapping with the keys of a unit; got %s", describe(n))
		return nil
	}
	u := &Unit{
		line:  item.Line,
		paths: d.paths,
	}
	c := &unitCtx{d: d, u: u, label: label}
	keys := unitKeys()
	allowed := make([]string, len(keys))
	for i, k := range keys {
		allowed[i] = k.name
	}

	// The id first, so that every later diagnostic names the unit. Keys
	// are checked by a first, silent pass that only looks for it.
	for j := 0; j+1 < len(n.Content); j += 2 {
		if k := resolve(n.Content[j]); k.Kind == yaml.ScalarNode && k.Value == "id" {
			if v := resolve(n.Content[j+1]); v.Kind == yaml.ScalarNode && v.Tag != "!!null" && v.Value != "" {
				c.label = v.Value
			}
			break
		}
	}
	m, _ := c.open(n, "", item.Line, allowed...)
	if m == nil {
		return c
	}
	if id, ok := c.text(m, "id", true, "a unique id of letters, digits, '-', '_' and '.'"); ok {
		if msg := checkID(id); msg != "" {
			c.errorf(u.Line("id"), "id", "%s", msg)
		}
		u.ID = id
	}
	for _, k := range keys {
		if k.decode == nil {
			continue
		}
		v, line, present := m.get(k.name)
		if !present {
			if k.required {
				c.errorf(line, k.name, "missing; every unit needs %s:", k.name)
			}
			continue
		}
		k.decode(c, v, k.name, line)
	}
	c.crossChecks()
	return c
}

// checkID returns "" for a valid unit id, else what is wrong.
func checkID(id string) string {
	if id == "" {
		return "must not be empty; use letters, digits, '-', '_' and '.'"
	}
	if len(id) > maxIDLen {
		return fmt.Sprintf("is %d characters long; at most %d are allowed", len(id), maxIDLen)
	}
	for _, r := range id {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '-' || r == '_' || r == '.') {
			return fmt.Sprintf("contains %q; only letters, digits, '-', '_' and '.' are allowed", r)
		}
	}
	return ""
}

func (c *unitCtx) decodeName(v *yaml.Node, path string, line int) {
	m := &mapping{entries: []mappingEntry{{path, v, line}}, line: line}
	if s, ok := c.text(m, path, false, "a display name"); ok {
		c.u.Name = s
	}
}

func (c *unitCtx) decodeSite(v *yaml.Node, path string, line int) {
	m := &mapping{entries: []mappingEntry{{path, v, line}}, line: line}
	if s, ok := c.text(m, path, false, "the site name"); ok {
		c.u.Site = s
	}
}

func (c *unitCtx) decodeRating(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "mva", "kv", "power_factor", "frequency_hz", "poles")
	if !ok {
		return
	}
	r := &c.u.Rating
	r.MVA, _ = c.number(m, "mva", true, "the rated apparent power in MVA", positive)
	r.KV, _ = c.number(m, "kv", true, "the rated line-line voltage in kV", positive)
	r.PowerFactor, _ = c.number(m, "power_factor", true, "the rated power factor", nil)
	r.FrequencyHz, _ = c.number(m, "frequency_hz", true, "the rated frequency in Hz", nil)
	poles, _ := c.number(m, "poles", false, "the number of poles, a positive even integer", func(x float64) string {
		if x > 0 && x <= maxPoles && x == math.Trunc(x) && math.Mod(x, 2) == 0 {
			return ""
		}
		return fmt.Sprintf("must be a positive even integer (2 to %d)", maxPoles)
	})
	r.Poles = int(poles)
}

func (c *unitCtx) decodeMachine(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "rotor", "xd", "xq", "xl", "xp", "ra", "xd_transient", "inertia_h_s", "td0_transient_s", "damping_pu", "saturation")
	if !ok {
		return
	}
	mc := &c.u.Machine
	if rotor, ok := c.text(m, "rotor", true, "the rotor kind, round or salient"); ok {
		switch rotor {
		case "round":
			mc.Rotor = limits.Round
		case "salient":
			mc.Rotor = limits.Salient
		default:
			c.errorf(c.u.Line("machine.rotor"), "machine.rotor", "must be round or salient; got %q", clip(rotor))
			c.clearOK("machine.rotor")
		}
	}
	// The values' domains (positive reactances, xq <= xd, ...) are
	// limits.New's rules, reported through build; here only their shape.
	const pu = " in pu on the machine base"
	mc.Xd, _ = c.number(m, "xd", true, "the unsaturated direct-axis synchronous reactance"+pu, nil)
	mc.Xq, _ = c.number(m, "xq", false, "the quadrature-axis synchronous reactance"+pu, nil)
	mc.Xl, _ = c.number(m, "xl", true, "the armature leakage reactance"+pu, nil)
	mc.Xp, _ = c.number(m, "xp", false, "the Potier reactance"+pu, nil)
	mc.Ra, _ = c.number(m, "ra", false, "the armature resistance"+pu, nil)
	mc.XdTransient, _ = c.number(m, "xd_transient", false, "the direct-axis transient reactance"+pu, nil)
	mc.InertiaHS, _ = c.number(m, "inertia_h_s", false, "the inertia constant H in s on the machine base", nil)
	mc.Td0TransientS, _ = c.number(m, "td0_transient_s", false, "the open-circuit direct-axis transient time constant T'd0 in s", nil)
	mc.DampingPU, _ = c.number(m, "damping_pu", false, "the mechanical damping D in pu torque per pu speed", nil)
	if sv, sl, present := m.get("saturation"); present {
		sm, ok := c.open(sv, "machine.saturation", sl, "s10", "s12")
		if ok {
			s10, ok10 := c.number(sm, "s10", true, "the saturation factor S(1.0)", nil)
			s12, ok12 := c.number(sm, "s12", true, "the saturation factor S(1.2)", nil)
			if ok10 && ok12 {
				mc.Saturation = &Saturation{S10: s10, S12: s12}
			}
		}
	}
}

func (c *unitCtx) decodeField(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "air_gap_a", "rated_a")
	if !ok {
		return
	}
	c.u.Field.AirGapA, _ = c.number(m, "air_gap_a", true, "IFag, the field current in A on the air-gap line at rated voltage", positive)
	c.u.Field.RatedA, _ = c.number(m, "rated_a", false, "the continuous rated field current in A", positive)
}

func (c *unitCtx) decodePrimeMover(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "p_max_mw", "p_min_mw")
	if !ok {
		return
	}
	c.u.PrimeMover.PMaxMW, _ = c.number(m, "p_max_mw", true, "the prime mover's largest active power in MW", nil)
	c.u.PrimeMover.PMinMW, _ = c.number(m, "p_min_mw", true, "the prime mover's smallest continuous active power in MW", nil)
}

func (c *unitCtx) decodeGrid(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "x_external_pu")
	if !ok {
		return
	}
	c.u.Grid.XExternalPU, _ = c.number(m, "x_external_pu", false, "the reactance to the infinite bus in pu on the machine base", nil)
}

func (c *unitCtx) decodeStability(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "basis", "zeta_min", "margin_fraction")
	if !ok {
		return
	}
	if b, ok := c.text(m, "basis", false, "the stability basis, manual or avr"); ok {
		switch b {
		case "manual":
			c.u.Stability.Basis = limits.BasisManual
		case "avr":
			c.u.Stability.Basis = limits.BasisAVR
		default:
			c.errorf(c.u.Line("stability.basis"), "stability.basis", "must be manual or avr; got %q", clip(b))
			c.clearOK("stability.basis")
		}
	}
	c.u.Stability.ZetaMin, _ = c.number(m, "zeta_min", false, "the lowest damping ratio of an electromechanical mode, in [0, 1)", nil)
	c.u.Stability.MarginFraction, _ = c.number(m, "margin_fraction", false, "the practical stability margin as a fraction of rated MW", nil)
}

// decodeExcitation decodes the regulator, its UEL and (through
// decodeLimiters) its OEL, SCL and V/Hz limiter.
func (c *unitCtx) decodeExcitation(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "k_a", "t_a_s", "t_r_s", "efd_min_pu", "efd_max_pu", "uel", "oel", "scl", "vhz_limiter")
	if !ok {
		return
	}
	e := &Excitation{}
	var okKA, okTA bool
	e.KA, okKA = c.number(m, "k_a", true, "the regulator gain K_A in pu field voltage per pu voltage error", nil)
	e.TAS, okTA = c.number(m, "t_a_s", true, "the exciter time constant T_A in s", nil)
	e.TRS, _ = c.number(m, "t_r_s", false, "the voltage transducer time constant T_R in s", nil)
	e.EfdMinPU, _ = c.number(m, "efd_min_pu", false, "the lowest field voltage in pu of the air-gap-line field", nil)
	e.EfdMaxPU, _ = c.number(m, "efd_max_pu", false, "the ceiling field voltage in pu of the air-gap-line field", nil)
	if uv, ul, present := m.get("uel"); present {
		e.UEL = c.decodeUEL(uv, join(path, "uel"), ul)
	}
	c.decodeLimiters(m, path)
	if okKA && okTA {
		c.u.Excitation = e
	}
}

// decodeUEL decodes an underexcitation limiter curve, circle or points.
func (c *unitCtx) decodeUEL(v *yaml.Node, path string, line int) *UEL {
	m, ok := c.open(v, path, line, "shape", "center_p_mw", "center_q_mvar", "radius_mvar", "voltage_exponent",
		"points", "voltage_exponent_p", "voltage_exponent_q")
	if !ok {
		return nil
	}
	shape, ok := c.text(m, "shape", true, "the form of the curve, circle or points")
	if !ok {
		return nil
	}
	u := &UEL{VoltageExponent: 2, VoltageExponentP: 2, VoltageExponentQ: 2}
	only := func(keys ...string) {
		for _, k := range keys {
			if _, kl, present := m.get(k); present {
				c.errorf(kl, join(path, k), "belongs to the other UEL shape; a %s UEL does not use it", shape)
			}
		}
	}
	good := true
	switch shape {
	case "circle":
		u.Shape = limits.UELCircle
		only("points", "voltage_exponent_p", "voltage_exponent_q")
		u.CenterPMW, _ = c.number(m, "center_p_mw", false, "the active power of the circle's centre in MW", nil)
		var okQ, okR bool
		u.CenterQMvar, okQ = c.number(m, "center_q_mvar", true, "the reactive power of the circle's centre in Mvar", nil)
		u.RadiusMvar, okR = c.number(m, "radius_mvar", true, "the circle's radius in Mvar", nil)
		if x, ok := c.number(m, "voltage_exponent", false, "the exponent k of the voltage scaling v^k", nil); ok {
			u.VoltageExponent = x
		}
		good = okQ && okR
	case "points":
		u.Shape = limits.UELPoints
		only("center_p_mw", "center_q_mvar", "radius_mvar", "voltage_exponent")
		if x, ok := c.number(m, "voltage_exponent_p", false, "the exponent k1 of p / v^k1", nil); ok {
			u.VoltageExponentP = x
		}
		if x, ok := c.number(m, "voltage_exponent_q", false, "the exponent k2 of v^k2 F", nil); ok {
			u.VoltageExponentQ = x
		}
		var listed bool
		u.Points, good, listed = c.curvePoints(m, path, "the limiter's reactive power at p_mw, in Mvar")
		if !listed {
			return nil
		}
	default:
		c.errorf(c.u.Line(join(path, "shape")), join(path, "shape"), "must be circle or points; got %q", clip(shape))
		return nil
	}
	if !good {
		return nil
	}
	return u
}

func (c *unitCtx) decodeStabilizer(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "k", "t_w_s", "t1_s", "t2_s", "t3_s", "t4_s")
	if !ok {
		return
	}
	s := &Stabilizer{}
	var good [6]bool
	s.K, good[0] = c.number(m, "k", true, "the stabilizer gain in pu per pu speed", nil)
	s.TWS, good[1] = c.number(m, "t_w_s", true, "the washout time constant T_w in s", nil)
	s.T1S, good[2] = c.number(m, "t1_s", true, "the lead time constant T1 of the first stage in s", nil)
	s.T2S, good[3] = c.number(m, "t2_s", true, "the lag time constant T2 of the first stage in s", nil)
	s.T3S, good[4] = c.number(m, "t3_s", true, "the lead time constant T3 of the second stage in s (t3_s = t4_s for no second stage)", nil)
	s.T4S, good[5] = c.number(m, "t4_s", true, "the lag time constant T4 of the second stage in s (t3_s = t4_s for no second stage)", nil)
	if good == [6]bool{true, true, true, true, true, true} {
		c.u.Stabilizer = s
	}
}

func (c *unitCtx) decodeEndRegion(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "voltage_exponent", "points")
	if !ok {
		return
	}
	e := &EndRegion{}
	e.VoltageExponent, _ = c.number(m, "voltage_exponent", false, "the exponent k of the voltage scaling v^k", nil)
	var good, listed bool
	e.Points, good, listed = c.curvePoints(m, path, "the lowest admissible reactive power at p_mw, in Mvar")
	if listed && good {
		c.u.EndRegion = e
	}
}

// curvePoints reads the required list path.points of {p_mw, q_mvar}
// points; qMeaning says what q_mvar is. listed is false when there is no
// usable list at all, good false when a point had an error (reported).
func (c *unitCtx) curvePoints(m *mapping, path, qMeaning string) (ps []CurvePoint, good, listed bool) {
	items, _, ok := c.list(m, "points", true, "at least two points {p_mw, q_mvar} with increasing p_mw")
	if !ok {
		return nil, false, false
	}
	field := join(path, "points")
	good = true
	for i, item := range items {
		pm, _, ok := c.openItem(item, field, i, "p_mw", "q_mvar")
		if !ok {
			good = false
			continue
		}
		p, okP := c.number(pm, "p_mw", true, "the active power of the point in MW", nil)
		q, okQ := c.number(pm, "q_mvar", true, qMeaning, nil)
		if !okP || !okQ {
			good = false
			continue
		}
		ps = append(ps, CurvePoint{PMW: p, QMvar: q, Line: item.Line})
	}
	return ps, good, true
}

func (c *unitCtx) decodeCoolant(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "quantity", "points")
	if !ok {
		return
	}
	co := &Coolant{}
	var names []string
	for _, q := range CoolantQuantities() {
		names = append(names, string(q))
	}
	allowed := strings.Join(names, ", ")
	if q, ok := c.text(m, "quantity", true, "what the table is indexed by: "+allowed); ok {
		if !contains(names, q) {
			c.errorf(c.u.Line("coolant.quantity"), "coolant.quantity", "unknown quantity %q; allowed: %s", clip(q), allowed)
			c.clearOK("coolant.quantity")
		}
		co.Quantity = CoolantQuantity(q)
	}
	items, _, ok := c.list(m, "points", true, "at least two points {at, armature, field} with increasing at")
	if !ok {
		return
	}
	field := join(path, "points")
	good := true
	for i, item := range items {
		pm, _, ok := c.openItem(item, field, i, "at", "armature", "field")
		if !ok {
			good = false
			continue
		}
		at, okA := c.number(pm, "at", true, "the coolant value of the point", nil)
		arm, okR := c.number(pm, "armature", true, "the armature current factor at this coolant value", nil)
		fld, okF := c.number(pm, "field", true, "the field current factor at this coolant value", nil)
		if !okA || !okR || !okF {
			good = false
			continue
		}
		co.Points = append(co.Points, CoolantPoint{At: at, Armature: arm, Field: fld, Line: item.Line})
	}
	if good && c.isOK("coolant.quantity") {
		c.u.Coolant = co
	}
}

// crossChecks fills the defaults that depend on other values and checks
// that the keys one value needs are given. The values' domains and their
// relations (xq <= xd, p_min < p_max, ...) are limits.New's rules,
// reported through build.
func (c *unitCtx) crossChecks() {
	u, ok := c.u, c.isOK
	mc := &u.Machine
	if ok("machine.rotor") && mc.Rotor == limits.Salient && !u.Has("machine.xq") {
		c.errorf(u.Line("machine"), "machine.xq", "missing; a salient-pole rotor needs xq, the quadrature-axis synchronous reactance in pu (below xd)")
	}
	if !u.Has("machine.xq") && ok("machine.xd") {
		mc.Xq = mc.Xd
	}
	if !u.Has("machine.xp") && ok("machine.xl") {
		mc.Xp = mc.Xl
	}
	if !u.Has("stability.basis") && u.Excitation != nil {
		// The default basis: the regulator is in service when it is known.
		u.Stability.Basis = limits.BasisAVR
	}
	u.Base = limits.Base{MVA: u.Rating.MVA, KV: u.Rating.KV, FrequencyHz: u.Rating.FrequencyHz, IFagA: u.Field.AirGapA}
	c.protectionCrossChecks()
}
