package access

import (
	"strings"
	"testing"
)

const sample = `# test access file
identities:
  - name: gw.ridge.example
    grants:
      - {role: telemetry_writer, sites: [ridge]}
  - name: ana
    grants:
      - {role: operator, sites: [ridge], units: ["ridge-*"]}
      - {role: viewer}
  - name: vic
    grants:
      - {role: viewer, sites: [ridge, "lake*"]}
  - name: root
    grants:
      - {role: admin}
`

func mustParse(t testing.TB, s string) *Policy {
	t.Helper()
	p, err := Parse([]byte(s))
	if err != nil {
		t.Fatalf("Parse: %v", err)
	}
	return p
}

// The patterns against the rules stated in the package: * any run, ?
// one byte, everything else literal (checked against path.Match's
// semantics for these inputs, written out by hand).
func TestMatch(t *testing.T) {
	for _, tc := range []struct {
		pat, s string
		want   bool
	}{
		{"*", "", true},
		{"*", "ridge-1", true},
		{"ridge-*", "ridge-1", true},
		{"ridge-*", "ridge-", true},
		{"ridge-*", "ridge", false},
		{"ridge-?", "ridge-12", false},
		{"ridge-??", "ridge-12", true},
		{"*-2", "lake-2", true},
		{"*-2", "lake-3", false},
		{"a*b*c", "axxbyyc", true},
		{"a*b*c", "axxbyy", false},
		{"lake", "lake", true},
		{"lake", "lakes", false},
		{"", "", true},
		{"", "x", false},
		{"**", "anything", true},
	} {
		if got := match(tc.pat, tc.s); got != tc.want {
			t.Errorf("match(%q, %q) = %v, want %v", tc.pat, tc.s, got, tc.want)
		}
	}
}

func TestRights(t *testing.T) {
	p := mustParse(t, sample)
	for _, tc := range []struct {
		who        string
		role       Role
		unit, site string
		want       bool
	}{
		{"gw.ridge.example", TelemetryWriter, "ridge-1", "ridge", true},
		{"gw.ridge.example", TelemetryWriter, "lake-1", "lake", false},
		{"gw.ridge.example", Viewer, "ridge-1", "ridge", false},
		{"ana", Operator, "ridge-1", "ridge", true},
		{"ana", Operator, "lake-1", "lake", false}, // site A operator, site B alarm
		{"ana", Viewer, "lake-1", "lake", true},
		{"ana", Admin, "", "", false},
		{"vic", Viewer, "lake-2", "lakeside", true},
		{"vic", Operator, "ridge-1", "ridge", false},
		{"root", Admin, "", "", true},
		{"root", Viewer, "ridge-1", "ridge", false},
		{"nobody", Viewer, "ridge-1", "ridge", false},
	} {
		r := p.rights([]string{tc.who})
		if got := r.Allows(tc.role, tc.unit, tc.site); got != tc.want {
			t.Errorf("%s %s over %s (site %s) = %v, want %v", tc.who, tc.role, tc.unit, tc.site, got, tc.want)
		}
	}
	if !p.rights([]string{"ana"}).Has(Viewer) || p.rights([]string{"vic"}).Has(Operator) {
		t.Error("Has: an operator also views; a viewer does not operate")
	}
}

// Every problem is listed at once, each with its line.
func TestParseErrors(t *testing.T) {
	for _, tc := range []struct {
		name, in string
		want     []string
	}{
		{"empty", "", []string{"empty"}},
		{"unknown key", "identities:\n  - name: a\n    grant: []\n", []string{"line 3", "grant"}},
		{"bad role and no name", "identities:\n  - name: a\n    grants:\n      - {role: superuser}\n  - grants: [{role: viewer}]\n", []string{"4: identity \"a\": role \"superuser\"", "5: identity without a name"}},
		{"duplicate", "identities:\n  - {name: a, grants: [{role: viewer}]}\n  - {name: a, grants: [{role: admin}]}\n", []string{"3: identity \"a\" is already given at line 2"}},
		{"no grants", "identities:\n  - name: a\n", []string{"2: identity \"a\" has no grants"}},
		{"control character", "identities:\n  - {name: \"a\\x01\", grants: [{role: viewer}]}\n", []string{"2: identity name"}},
		{"empty pattern", "identities:\n  - {name: a, grants: [{role: viewer, units: [\"\"]}]}\n", []string{"2: identity \"a\": pattern \"\""}},
		{"not a list", "identities: 3\n", []string{"line 1"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Parse([]byte(tc.in))
			if err == nil {
				t.Fatal("accepted")
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q lacks %q", err, w)
				}
			}
		})
	}
}

func TestSanitize(t *testing.T) {
	for _, tc := range []struct{ in, want string }{
		{"  ana  ", "ana"},
		{"ana\r\nFAKE LOG LINE", "anaFAKE LOG LINE"},
		{"a\x1b[31mred", "a[31mred"},
		{"b\u202eevil", "bevil"},
		{strings.Repeat("é", 40), strings.Repeat("é", 32)}, // 64 bytes, cut at a character
	} {
		if got := Sanitize(tc.in, 64); got != tc.want {
			t.Errorf("Sanitize(%q) = %q, want %q", tc.in, got, tc.want)
		}
	}
}

// The per-sample check does not allocate.
func TestAllowsDoesNotAllocate(t *testing.T) {
	p := mustParse(t, sample)
	c := &Caller{rights: p.rights([]string{"gw.ridge.example"}), siteOf: func(id string) (string, bool) { return "ridge", true }}
	n := testing.AllocsPerRun(1000, func() {
		_ = c.Allows("ridge-1")
		_ = c.Allows("lake-1")
	})
	if n != 0 {
		t.Errorf("Allows allocates %v times per call", n)
	}
}

func BenchmarkAllows(b *testing.B) {
	p := mustParse(b, sample)
	sites := map[string]string{"ridge-1": "ridge", "lake-1": "lake"}
	c := &Caller{rights: p.rights([]string{"gw.ridge.example"}), siteOf: func(id string) (string, bool) { s, ok := sites[id]; return s, ok }}
	b.ReportAllocs()
	for b.Loop() {
		_ = c.Allows("ridge-1")
		_ = c.Allows("lake-1")
	}
}

// FuzzParse: the access file parser never panics, and whatever it
// accepts grants only the roles it names.
func FuzzParse(f *testing.F) {
	f.Add([]byte(sample))
	f.Add([]byte("identities: [{name: a, grants: [{role: viewer, units: ['*']}]}]"))
	f.Add([]byte("identities:\n  - &x {name: a, grants: [{role: admin}]}\n  - *x\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		p, err := Parse(data)
		if err != nil {
			return
		}
		for name, gs := range p.byName {
			if name == "" || !printable(name) {
				t.Fatalf("accepted identity name %q", name)
			}
			for _, g := range gs {
				if g.Role >= NumRoles {
					t.Fatalf("role %d", g.Role)
				}
				r := p.rights([]string{name})
				_ = r.Allows(g.Role, "unit", "site")
			}
		}
	})
}
