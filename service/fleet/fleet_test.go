package fleet

import (
	"fmt"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/limits"
)

func readGood(t testing.TB) string {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("testdata", "good.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	return string(data)
}

// want is one expected diagnostic.
type want struct {
	line  int
	field string
	sev   Severity
	text  string // a part of the message
}

// edit replaces the only occurrence of old in s with new.
func edit(t *testing.T, s, old, new string) string {
	t.Helper()
	if n := strings.Count(s, old); n != 1 {
		t.Fatalf("edit: %q occurs %d times in the base file", old, n)
	}
	return strings.Replace(s, old, new, 1)
}

func TestParseGood(t *testing.T) {
	f, ds := Parse("good.yaml", []byte(readGood(t)))
	if len(ds) != 0 {
		t.Fatalf("good file: want no diagnostics, got\n%s", ds)
	}
	if got := f.IDs(); strings.Join(got, ",") != "ridge-2,hydro-1" {
		t.Fatalf("ids = %v", got)
	}
	r := f.Unit("ridge-2")
	h := f.Unit("hydro-1")
	if r == nil || h == nil || f.Unit("nope") != nil {
		t.Fatal("lookup by id is wrong")
	}
	if r.Model == nil || h.Model == nil {
		t.Fatal("units without errors must have a model")
	}
	tests := []struct {
		name      string
		got, want float64
	}{
		{"ridge mva", r.Rating.MVA, 247},
		{"ridge base kv", r.Base.KV, 15.75},
		{"ridge base IFag", r.Base.IFagA, 620},
		{"ridge base frequency", r.Base.FrequencyHz, 50},
		{"ridge xq given", r.Machine.Xq, 2.0},
		{"ridge xp given", r.Machine.Xp, 0.18},
		{"ridge pmax pu", r.Model.Params().PMax, 210.0 / 247},
		{"ridge pmin pu", r.Model.Params().PMin, 60.0 / 247},
		{"ridge rated field pu", r.Model.RatedFieldCurrent(), 1860.0 / 620},
		{"ridge end-region q pu", r.Model.Params().EndRegion.Q[0], -120.0 / 247},
		{"ridge coolant at", r.Model.Params().Coolant.At[1], 414},
		{"ridge xe", r.Model.Params().Xe, 0.22},
		{"hydro xp defaults to xl", h.Machine.Xp, 0.15},
		{"hydro ra defaults to 0", h.Machine.Ra, 0},
		{"hydro margin defaults to 0", h.Model.Params().MarginFraction, 0},
		{"hydro xe defaults to 0", h.Model.Params().Xe, 0},
		{"hydro rated field from model", h.Model.RatedFieldCurrent(), h.Model.ModelRatedFieldCurrent()},
		{"hydro poles", float64(h.Rating.Poles), 36},
		{"hydro speed rpm", h.Rating.SpeedRPM(), 120 * 50 / 36.0},
	}
	for _, tc := range tests {
		if math.Abs(tc.got-tc.want) > 1e-12 {
			t.Errorf("%s = %v, want %v", tc.name, tc.got, tc.want)
		}
	}
	if h.Machine.Rotor != limits.Salient || r.Machine.Rotor != limits.Round {
		t.Error("rotor kinds are wrong")
	}
	if r.Coolant.Quantity != HydrogenPressureKPa || r.Coolant.Quantity.Unit() != "kPa" {
		t.Error("coolant quantity is wrong")
	}
	if r.DisplayName() != "Ridge unit 2" || h.DisplayName() != "hydro-1" || r.Site != "ridge" {
		t.Error("names are wrong")
	}
	lines := []struct {
		field string
		line  int
	}{
		{"rating.mva", 6},
		{"machine.saturation.s12", 22},
		{"machine.saturation", 20},
		{"end_region.points[2].p_mw", 37},
		{"end_region.points", 35},
		{"coolant.points[2]", 43},
		{"grid.x_external_pu", 30},
		{"stability.margin_fraction", 32},
		{"machine.nothing_here", 11}, // absent key: its block
		{"", 2},                      // nothing: the unit
	}
	for _, tc := range lines {
		if got := r.Line(tc.field); got != tc.line {
			t.Errorf("Line(%q) = %d, want %d", tc.field, got, tc.line)
		}
	}
	if h.Has("machine.xp") || !h.Has("machine.xq") {
		t.Error("Has is wrong")
	}
}

func TestParseExample(t *testing.T) {
	path := filepath.Join("..", "..", "deploy", "examples", "fleet.yaml")
	f, ds, err := Load(path)
	if err != nil {
		t.Fatal(err)
	}
	if len(ds) != 0 {
		t.Fatalf("%s: want no diagnostics, got\n%s", path, ds)
	}
	kinds := map[limits.Rotor]int{}
	quantities := map[CoolantQuantity]bool{}
	for _, u := range f.Units {
		kinds[u.Machine.Rotor]++
		if u.Coolant != nil {
			quantities[u.Coolant.Quantity] = true
		}
		if u.Model == nil {
			t.Errorf("%s: no model", u.ID)
		}
	}
	if kinds[limits.Salient] == 0 || kinds[limits.Round] == 0 || !quantities[HydrogenPressureKPa] || !quantities[AmbientC] {
		t.Errorf("the example should have round and salient units and hydrogen and ambient tables: %v %v", kinds, quantities)
	}
}

func TestLoadMissingFile(t *testing.T) {
	_, _, err := Load(filepath.Join(t.TempDir(), "absent.yaml"))
	if err == nil || !os.IsNotExist(err) && !strings.Contains(err.Error(), "no such file") {
		t.Fatalf("want a not-exist error, got %v", err)
	}
}

// TestParseRules checks one bad file per rule: the exact diagnostics, with
// line and field.
func TestParseRules(t *testing.T) {
	base := readGood(t)
	const (
		E = Error
		W = Warning
	)
	tests := []struct {
		name string
		file func(t *testing.T) string
		want []want
	}{
		{"unknown unit key", func(t *testing.T) string { return edit(t, base, "    site: ridge", "    sight: ridge") },
			[]want{{4, "sight", E, "unknown key; allowed keys here: id, name, site, rating"}}},
		{"unknown nested key", func(t *testing.T) string { return edit(t, base, "      xl: 0.16", "      xll: 0.16") },
			[]want{{15, "machine.xll", E, "allowed keys here: rotor, xd, xq, xl"}, {11, "machine.xl", E, "missing"}}},
		{"missing required key", func(t *testing.T) string { return edit(t, base, "      kv: 15.75\n", "") },
			[]want{{5, "rating.kv", E, "missing; give the rated line-line voltage in kV"}}},
		{"missing block", func(t *testing.T) string {
			return edit(t, base, "    field: {air_gap_a: 680}\n", "")
		}, []want{{44, "field", E, "missing; every unit needs field:"}}},
		{"missing id", func(t *testing.T) string { return edit(t, base, "  - id: hydro-1\n    rating:", "  - rating:") },
			[]want{{44, "id", E, "missing; give a unique id"}}},
		{"quoted number", func(t *testing.T) string { return edit(t, base, "mva: 247", `mva: "247"`) },
			[]want{{6, "rating.mva", E, `must be a number (the rated apparent power in MVA); got "247" (remove the quotes)`}}},
		{"string for number", func(t *testing.T) string { return edit(t, base, "xd: 2.1", "xd: abc") },
			[]want{{13, "machine.xd", E, `must be a number`}}},
		{"list for number", func(t *testing.T) string { return edit(t, base, "xd: 2.1", "xd: [2.1]") },
			[]want{{13, "machine.xd", E, `got a list`}}},
		{"null for number", func(t *testing.T) string { return edit(t, base, "xd: 2.1", "xd:") },
			[]want{{13, "machine.xd", E, `got nothing`}}},
		{"nan", func(t *testing.T) string { return edit(t, base, "xd: 2.1", "xd: .nan") },
			[]want{{13, "machine.xd", E, "must be a finite number"}}},
		{"inf", func(t *testing.T) string { return edit(t, base, "mva: 247", "mva: .inf") },
			[]want{{6, "rating.mva", E, "must be a finite number"}}},
		{"huge number", func(t *testing.T) string { return edit(t, base, "mva: 247", "mva: 1e400") },
			[]want{{6, "rating.mva", E, "out of range"}}},
		{"zero mva", func(t *testing.T) string { return edit(t, base, "mva: 247", "mva: 0") },
			[]want{{6, "rating.mva", E, "must be positive, got 0"}}},
		{"negative kv", func(t *testing.T) string { return edit(t, base, "kv: 15.75", "kv: -15.75") },
			[]want{{7, "rating.kv", E, "must be positive, got -15.75"}}},
		{"power factor above 1", func(t *testing.T) string { return edit(t, base, "power_factor: 0.85", "power_factor: 1.2") },
			[]want{{8, "rating.power_factor", E, "must be in (0, 1], got 1.2"}}},
		{"power factor 0", func(t *testing.T) string { return edit(t, base, "power_factor: 0.85", "power_factor: 0") },
			[]want{{8, "rating.power_factor", E, "must be in (0, 1]"}}},
		{"frequency 0", func(t *testing.T) string {
			return edit(t, base, "frequency_hz: 50\n      poles", "frequency_hz: 0\n      poles")
		},
			[]want{{9, "rating.frequency_hz", E, "must be a positive frequency"}}},
		{"odd poles", func(t *testing.T) string { return edit(t, base, "poles: 2\n", "poles: 3\n") },
			[]want{{10, "rating.poles", E, "must be a positive even integer"}}},
		{"fractional poles", func(t *testing.T) string { return edit(t, base, "poles: 2\n", "poles: 2.5\n") },
			[]want{{10, "rating.poles", E, "must be a positive even integer"}}},
		{"zero poles", func(t *testing.T) string { return edit(t, base, "poles: 36", "poles: 0") },
			[]want{{45, "rating.poles", E, "must be a positive even integer"}}},
		{"bad rotor", func(t *testing.T) string { return edit(t, base, "rotor: round", "rotor: square") },
			[]want{{12, "machine.rotor", E, `must be round or salient; got "square"`}}},
		{"xq above xd", func(t *testing.T) string { return edit(t, base, "xq: 2.0", "xq: 2.2") },
			[]want{{14, "machine.xq", E, "xq (2.2) must not exceed xd (2.1)"}}},
		{"salient without xq", func(t *testing.T) string { return edit(t, base, "      xq: 0.66\n", "") },
			[]want{{46, "machine.xq", E, "a salient-pole rotor needs xq"}}},
		{"salient xq equal to xd", func(t *testing.T) string { return edit(t, base, "xq: 0.66", "xq: 1.05") },
			[]want{{49, "machine.xq", E, "a salient-pole rotor needs xq < xd"}}},
		{"zero leakage", func(t *testing.T) string { return edit(t, base, "xl: 0.16", "xl: 0") },
			[]want{{15, "machine.xl", E, "must be a positive reactance below xd (2.1 pu), got 0"}}},
		{"negative xd", func(t *testing.T) string { return edit(t, base, "xd: 2.1", "xd: -2.1") },
			[]want{{13, "machine.xd", E, "must be a positive finite reactance in pu, got -2.1"}}},
		{"leakage above xd", func(t *testing.T) string { return edit(t, base, "xl: 0.15", "xl: 1.5") },
			[]want{{50, "machine.xl", E, "below xd (1.05 pu), got 1.5"}, {46, "machine.xp", E, "below xd (1.05 pu), got 1.5"}}},
		{"transient above xd", func(t *testing.T) string { return edit(t, base, "xd_transient: 0.25", "xd_transient: 2.5") },
			[]want{{18, "machine.xd_transient", E, "must be in (0, xd)"}}},
		{"negative inertia", func(t *testing.T) string { return edit(t, base, "inertia_h_s: 4.5", "inertia_h_s: -4.5") },
			[]want{{19, "machine.inertia_h_s", E, "must be a positive time"}}},
		{"ra too large", func(t *testing.T) string { return edit(t, base, "ra: 0.002", "ra: 0.2") },
			[]want{{17, "machine.ra", E, "must be in [0, 0.1]"}}},
		{"s12 not above s10", func(t *testing.T) string { return edit(t, base, "s12: 0.32", "s12: 0.05") },
			[]want{{22, "machine.saturation.s12", E, "s12 (0.05) must exceed 1.2 x s10 (0.108)"}}},
		{"s12 missing", func(t *testing.T) string { return edit(t, base, "        s12: 0.32\n", "") },
			[]want{{20, "machine.saturation.s12", E, "missing"}}},
		{"duplicate id", func(t *testing.T) string { return edit(t, base, "id: hydro-1", "id: ridge-2") },
			[]want{{44, "id", E, "duplicate id; it is already used by the unit on line 2"}}},
		{"invalid id", func(t *testing.T) string { return edit(t, base, "id: ridge-2", "id: ridge 2") },
			[]want{{2, "id", E, `contains ' '`}}},
		{"duplicate key", func(t *testing.T) string {
			return edit(t, base, "      mva: 247\n", "      mva: 247\n      mva: 250\n")
		},
			[]want{{7, "rating.mva", E, "given twice; it was already given on line 6"}}},
		{"text for a block", func(t *testing.T) string {
			return edit(t, base, "    grid:\n      x_external_pu: 0.22\n", "    grid: strong\n")
		},
			[]want{{29, "grid", E, `must be a mapping with the keys x_external_pu; got "strong"`}}},
		{"mapping for text", func(t *testing.T) string { return edit(t, base, "name: Ridge unit 2", "name: {a: 1}") },
			[]want{{3, "name", E, "must be text"}}},
		{"margin 1", func(t *testing.T) string { return edit(t, base, "margin_fraction: 0.10", "margin_fraction: 1") },
			[]want{{32, "stability.margin_fraction", E, "must be in [0, 1)"}}},
		{"negative external reactance", func(t *testing.T) string { return edit(t, base, "x_external_pu: 0.22", "x_external_pu: -0.22") },
			[]want{{30, "grid.x_external_pu", E, "must be a non-negative reactance"}}},
		{"end region not increasing", func(t *testing.T) string {
			return edit(t, base, "{p_mw: 100, q_mvar: -100}", "{p_mw: 0, q_mvar: -100}")
		},
			[]want{{37, "end_region.points[2]", E, "point 2: p_mw must be finite and above the previous point's"}}},
		{"end region one point", func(t *testing.T) string {
			return edit(t, base, "        - {p_mw: 100, q_mvar: -100}\n        - {p_mw: 210, q_mvar: -60}\n", "")
		}, []want{{35, "end_region.points", E, "need at least two points"}}},
		{"end region point missing q", func(t *testing.T) string { return edit(t, base, "{p_mw: 100, q_mvar: -100}", "{p_mw: 100}") },
			[]want{{37, "end_region.points[2].q_mvar", E, "missing"}}},
		{"end region not a list", func(t *testing.T) string {
			return edit(t, base, "      points:\n        - {p_mw: 0", "      points: 3\n      pp:\n        - {p_mw: 0")
		}, []want{{35, "end_region.points", E, "must be a list"}, {36, "end_region.pp", E, "unknown key"}}},
		{"coolant not increasing", func(t *testing.T) string { return edit(t, base, "{at: 414,", "{at: 200,") },
			[]want{{43, "coolant.points[2].at", E, "point 2: at must be finite and above the previous point's"}}},
		{"coolant one point", func(t *testing.T) string {
			return edit(t, base, "        - {at: 414, armature: 1.0, field: 1.0}\n", "")
		},
			[]want{{41, "coolant.points", E, "need at least two points"}}},
		{"coolant factor zero", func(t *testing.T) string { return edit(t, base, "armature: 0.86", "armature: 0") },
			[]want{{42, "coolant.points[1]", E, "factors must be in (0, 2], got armature 0"}}},
		{"unknown coolant quantity", func(t *testing.T) string { return edit(t, base, "quantity: hydrogen_pressure_kpa", "quantity: helium") },
			[]want{{40, "coolant.quantity", E, `unknown quantity "helium"; allowed: hydrogen_pressure_kpa, cold_gas_c, ambient_c`}}},
		{"p_min not below p_max", func(t *testing.T) string { return edit(t, base, "p_min_mw: 60", "p_min_mw: 210") },
			[]want{{28, "prime_mover.p_min_mw", E, "must be at least 0 and below p_max_mw; got 0.8502 against 0.8502 pu"}}},
		{"p_max above rated MVA", func(t *testing.T) string { return edit(t, base, "p_max_mw: 110", "p_max_mw: 130") },
			[]want{{52, "prime_mover.p_max_mw", E, "must not exceed the rated MVA"}}},
		{"rated point outside envelope", func(t *testing.T) string { return edit(t, base, "rated_a: 1860", "rated_a: 1500") },
			[]want{
				{25, "field.rated_a", W, "the rated point (209.9 MW, 130.1 Mvar at 15.75 kV) is outside the unit's own envelope by 81.5 Mvar: the field limit allows at most 48.6 Mvar"},
				{25, "field.rated_a", W, "the nameplate rated field current 1500 A is -"},
			}},
		{"rated field far from model", func(t *testing.T) string { return edit(t, base, "rated_a: 1860", "rated_a: 2100") },
			[]want{{25, "field.rated_a", W, "the nameplate rated field current 2100 A is +13."}}},
		{"empty units", func(*testing.T) string { return "units: []\n" },
			[]want{{1, "units", E, "the list is empty"}}},
		{"null units", func(*testing.T) string { return "# a fleet\nunits:\n" },
			[]want{{2, "units", E, "must be a list of units; got nothing"}}},
		{"no units key", func(*testing.T) string { return "unit:\n  - id: a\n" },
			[]want{{1, "unit", E, "unknown key; allowed keys here: alarms, units"}, {1, "units", E, "missing; a fleet file needs a units: list"}}},
		{"empty file", func(*testing.T) string { return "" },
			[]want{{0, "", E, "the file is empty"}}},
		{"comments only", func(*testing.T) string { return "# nothing yet\n" },
			[]want{{0, "", E, "the file is empty"}}},
		{"not a mapping", func(*testing.T) string { return "- a\n- b\n" },
			[]want{{1, "", E, "the file must be a mapping with the keys alarms, units; got a list"}}},
		{"unit not a mapping", func(*testing.T) string { return "units:\n  - ridge-2\n" },
			[]want{{2, "", E, "each entry of units: must be a mapping"}}},
		{"yaml syntax", func(t *testing.T) string { return edit(t, base, "xd: 2.1", "xd: [2.1") },
			[]want{{12, "", E, "not valid YAML"}}}, // the YAML parser reports the line before
		{"two documents", func(t *testing.T) string { return base + "---\nunits: []\n" },
			[]want{{53, "", E, "a fleet file holds one YAML document"}}},
		{"merge key", func(t *testing.T) string { return edit(t, base, "      rotor: round\n", "      <<: {rotor: round}\n") },
			[]want{{12, "machine", E, "merge keys (<<) are not supported"}, {11, "machine.rotor", E, "missing"}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, ds := Parse("bad.yaml", []byte(tc.file(t)))
			if len(ds) != len(tc.want) {
				t.Fatalf("want %d diagnostics, got %d:\n%s", len(tc.want), len(ds), ds)
			}
			// Match regardless of order; the order is checked below.
			got := append(Diagnostics(nil), ds...)
			for _, w := range tc.want {
				found := -1
				for i, d := range got {
					if d.Line == w.line && d.Field == w.field && d.Severity == w.sev && strings.Contains(d.Message, w.text) {
						found = i
						break
					}
				}
				if found < 0 {
					t.Errorf("missing diagnostic line %d field %q %v containing %q; got\n%s", w.line, w.field, w.sev, w.text, ds)
					continue
				}
				got = append(got[:found], got[found+1:]...)
			}
			if !sort.SliceIsSorted(ds, func(i, j int) bool { return ds[i].Line < ds[j].Line }) {
				t.Errorf("diagnostics not in line order:\n%s", ds)
			}
		})
	}
}

func TestParseCollectsAll(t *testing.T) {
	base := readGood(t)
	s := strings.NewReplacer(
		"x_external_pu: 0.22", "x_external_pu: -1",
		"xd: 2.1", "xd: x",
		"p_min_mw: 60", "p_min_mw: -5",
		"quantity: hydrogen_pressure_kpa", "quantity: steam",
		"poles: 36", "poles: 35",
	).Replace(base)
	_, ds := Parse("bad.yaml", []byte(s))
	wantLines := []int{13, 28, 30, 40, 45}
	if len(ds) != len(wantLines) {
		t.Fatalf("want %d diagnostics, got\n%s", len(wantLines), ds)
	}
	for i, d := range ds {
		if d.Line != wantLines[i] || d.Severity != Error {
			t.Errorf("diagnostic %d: line %d (%v), want line %d error", i, d.Line, d.Severity, wantLines[i])
		}
	}
	if !ds.HasErrors() || ds.Count(Error) != 5 || ds.Count(Warning) != 0 {
		t.Errorf("counts are wrong")
	}
}

func TestDiagnosticString(t *testing.T) {
	tests := []struct {
		d    Diagnostic
		want string
	}{
		{Diagnostic{File: "f.yaml", Line: 3, UnitID: "a-1", Field: "rating.mva", Message: "must be positive, got 0"},
			`f.yaml:3: unit "a-1": rating.mva: must be positive, got 0`},
		{Diagnostic{File: "f.yaml", Line: 1, Field: "units", Message: "the list is empty"},
			`f.yaml:1: units: the list is empty`},
		{Diagnostic{File: "f.yaml", Message: "the file is empty"},
			`f.yaml: the file is empty`},
		{Diagnostic{File: "f.yaml", Line: 9, UnitID: "b", Field: "field.rated_a", Message: "far off", Severity: Warning},
			`f.yaml:9: unit "b": field.rated_a: warning: far off`},
	}
	for _, tc := range tests {
		if got := tc.d.String(); got != tc.want {
			t.Errorf("got  %s\nwant %s", got, tc.want)
		}
	}
}

// FuzzParse checks that no input makes Parse panic, that the diagnostics
// come in line order, and that a file without errors yields models.
func FuzzParse(f *testing.F) {
	f.Add([]byte(readGood(f)))
	if ex, err := os.ReadFile(filepath.Join("..", "..", "deploy", "examples", "fleet.yaml")); err == nil {
		f.Add(ex)
	}
	f.Add([]byte("units: []\n"))
	f.Add([]byte("units:\n  - id: a\n    rating: &r {mva: 1, kv: 1, power_factor: 1, frequency_hz: 50, poles: 2}\n  - id: b\n    rating: *r\n"))
	f.Add([]byte("units:\n  - {id: x, machine: {rotor: salient, xd: .nan}}\n"))
	f.Add([]byte("a: &a [*a]\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		fl, ds := Parse("fuzz.yaml", data)
		if fl == nil {
			t.Fatal("nil fleet")
		}
		for i, d := range ds {
			_ = d.String()
			if i > 0 && ds[i-1].Line > d.Line {
				t.Fatalf("diagnostics out of order:\n%s", ds)
			}
		}
		if !ds.HasErrors() {
			if len(fl.Units) == 0 {
				t.Fatal("no errors but no units")
			}
			for _, u := range fl.Units {
				if u.Model == nil {
					t.Fatalf("unit %q: no errors but no model", u.ID)
				}
			}
		}
	})
}

func TestParseAliasExpansionIsBounded(t *testing.T) {
	var b strings.Builder
	b.WriteString("units:\n  - id: u0\n    end_region:\n      points: &p\n")
	for i := 0; i < 2000; i++ {
		fmt.Fprintf(&b, "        - {p_mw: %d, q_mvar: -1}\n", i)
	}
	for i := 1; i < 600; i++ {
		fmt.Fprintf(&b, "  - {id: u%d, end_region: {points: *p}}\n", i)
	}
	_, ds := Parse("big.yaml", []byte(b.String()))
	found := false
	for _, d := range ds {
		if d.Field == "units" && strings.Contains(d.Message, "expand to more than") {
			found = true
		}
	}
	if !found {
		t.Fatalf("want a diagnostic about alias expansion; got %d diagnostics", len(ds))
	}
}

// Synchronous speed n = 120 f / poles (machine theory; fact of the trade):
// a 4-pole machine at 60 Hz turns at 1800 rpm, a 2-pole one at 50 Hz at
// 3000 rpm.
func TestSpeedRPM(t *testing.T) {
	for _, tc := range []struct {
		hz    float64
		poles int
		want  float64
	}{{60, 4, 1800}, {50, 2, 3000}, {60, 2, 3600}, {50, 4, 1500}} {
		if got := (Rating{FrequencyHz: tc.hz, Poles: tc.poles}).SpeedRPM(); got != tc.want {
			t.Errorf("%v Hz, %d poles: %v rpm, want %v", tc.hz, tc.poles, got, tc.want)
		}
	}
}

// regulated is a third unit, appended to good.yaml (which has 52 lines),
// with the keys of the avr basis and a UEL; its first line is 53.
const regulated = `  - id: hydro-3
    rating: {mva: 120, kv: 13.8, power_factor: 0.9, frequency_hz: 50}
    machine:
      rotor: salient
      xd: 1.05
      xq: 0.66
      xl: 0.15
      xd_transient: 0.3
      inertia_h_s: 3.2
      td0_transient_s: 5.6
      damping_pu: 1.5
    field: {air_gap_a: 680}
    prime_mover: {p_max_mw: 108, p_min_mw: 0}
    grid: {x_external_pu: 0.2}
    excitation:
      k_a: 200
      t_a_s: 0.02
      t_r_s: 0.01
      efd_min_pu: -4
      efd_max_pu: 5
      uel: {shape: circle, center_p_mw: 0, center_q_mvar: 24, radius_mvar: 84, voltage_exponent: 2}
    stabilizer: {k: 20, t_w_s: 10, t1_s: 0.2, t2_s: 0.05, t3_s: 0.2, t4_s: 0.05}
    stability: {zeta_min: 0.03}
`

// The regulator's keys reach the engine in per unit: MW and Mvar of the
// UEL divided by the rated 120 MVA, times as given; the basis defaults to
// avr with an exciter; poles may be left out.
func TestParseRegulator(t *testing.T) {
	f, ds := Parse("good.yaml", []byte(readGood(t)+regulated))
	if ds.HasErrors() {
		t.Fatalf("want no errors, got\n%s", ds)
	}
	u := f.Unit("hydro-3")
	if u == nil || u.Model == nil {
		t.Fatalf("no model for hydro-3:\n%s", ds)
	}
	p := u.Model.Params()
	if p.Basis != limits.BasisAVR || f.Unit("hydro-1").Model.Params().Basis != limits.BasisManual {
		t.Errorf("basis: %v and %v, want avr with an exciter, manual without", p.Basis, f.Unit("hydro-1").Model.Params().Basis)
	}
	e, s, c := p.Exciter, p.Stabilizer, p.UEL
	if e == nil || s == nil || c == nil {
		t.Fatalf("exciter %v, stabilizer %v, uel %v", e, s, c)
	}
	for _, tc := range []struct {
		name      string
		got, want float64
	}{
		{"k_a", e.KA, 200}, {"t_a", e.TAS, 0.02}, {"t_r", e.TRS, 0.01}, {"efd_min", e.EfdMin, -4}, {"efd_max", e.EfdMax, 5},
		{"pss k", s.K, 20}, {"t_w", s.TWS, 10}, {"t1", s.T1S, 0.2}, {"t2", s.T2S, 0.05}, {"t3", s.T3S, 0.2}, {"t4", s.T4S, 0.05},
		{"uel centre q pu", c.CenterQ, 24.0 / 120}, {"uel radius pu", c.Radius, 84.0 / 120}, {"uel k", c.K, 2},
		{"td0", p.Td0TransientS, 5.6}, {"damping", p.DampingPU, 1.5}, {"zeta_min", p.ZetaMin, 0.03},
		{"margin default", p.MarginFraction, 0}, {"speed without poles", u.Rating.SpeedRPM(), 0},
	} {
		if math.Abs(tc.got-tc.want) > 1e-12 {
			t.Errorf("%s = %v, want %v", tc.name, tc.got, tc.want)
		}
	}
	// A UEL given by points, with the voltage exponents' default 2.
	pts := strings.Replace(regulated, "uel: {shape: circle, center_p_mw: 0, center_q_mvar: 24, radius_mvar: 84, voltage_exponent: 2}",
		"uel: {shape: points, points: [{p_mw: 0, q_mvar: -30}, {p_mw: 60, q_mvar: -24}, {p_mw: 108, q_mvar: -12}]}", 1)
	f, ds = Parse("good.yaml", []byte(readGood(t)+pts))
	if ds.HasErrors() {
		t.Fatalf("points form: %s", ds)
	}
	c = f.Unit("hydro-3").Model.Params().UEL
	if c.Shape != limits.UELPoints || len(c.P) != 3 || c.P[1] != 0.5 || c.Q[2] != -0.1 || c.K1 != 2 || c.K2 != 2 {
		t.Errorf("points form: %+v", c)
	}
}

// Bad regulator data: each a FILE:LINE error on its key.
func TestParseRegulatorRules(t *testing.T) {
	base := readGood(t)
	const E, W = Error, Warning
	for _, tc := range []struct {
		name     string
		old, new string
		want     []want
	}{
		{"missing k_a", "      k_a: 200\n", "", []want{{67, "excitation.k_a", E, "missing; give the regulator gain"}}},
		{"negative gain", "k_a: 200", "k_a: -200", []want{{68, "excitation.k_a", E, "must be a non-negative gain, got -200"}}},
		{"t2 zero", "t2_s: 0.05, t3_s", "t2_s: 0, t3_s", []want{{74, "stabilizer.t2_s", E, "must be a positive lag time in s (a lead-lag needs t2 > 0), got 0"}}},
		{"zeta_min 1", "zeta_min: 0.03", "zeta_min: 1", []want{{75, "stability.zeta_min", E, "must be in [0, 1), got 1"}}},
		{"zeta_min negative", "zeta_min: 0.03", "zeta_min: -0.1", []want{{75, "stability.zeta_min", E, "must be in [0, 1)"}}},
		{"unknown basis", "{zeta_min: 0.03}", "{basis: auto}", []want{{75, "stability.basis", E, `must be manual or avr; got "auto"`}}},
		{"avr without exciter", regulated[strings.Index(regulated, "    excitation:"):], "    stability: {basis: avr}\n",
			[]want{{53, "excitation", E, "the avr stability basis needs the exciter"}}},
		{"missing t_a_s text", "t_a_s: 0.02", "t_a_s: fast", []want{{69, "excitation.t_a_s", E, "must be a number"}}},
		{"uel shape", "shape: circle", "shape: ellipse", []want{{73, "excitation.uel.shape", E, `must be circle or points; got "ellipse"`}}},
		{"uel radius missing", ", radius_mvar: 84", "", []want{{73, "excitation.uel.radius_mvar", E, "missing"}}},
		{"uel points not increasing", "uel: {shape: circle, center_p_mw: 0, center_q_mvar: 24, radius_mvar: 84, voltage_exponent: 2}",
			"uel: {shape: points, points: [{p_mw: 0, q_mvar: -30}, {p_mw: 0, q_mvar: -24}]}",
			[]want{{73, "excitation.uel.points[2]", E, "point 2: p_mw must be finite and above the previous point's"}}},
		{"oel without k_s", "      t_r_s: 0.01\n", "      oel: {pickup_pu: 1.05}\n", []want{{70, "excitation.oel.k_s", E, "missing"}}},
		{"power factor 1", "power_factor: 0.9, frequency_hz: 50}\n    machine:\n      rotor: salient\n      xd: 1.05\n      xq: 0.66\n      xl: 0.15\n      xd_transient",
			"power_factor: 1.0, frequency_hz: 50}\n    machine:\n      rotor: salient\n      xd: 1.05\n      xq: 0.66\n      xl: 0.15\n      xd_transient",
			// It validates; at 120 MW, beyond this unit's 108 MW prime mover, the
			// regulator's model finds no stable point: a warning, the unit is monitored.
			[]want{{54, "rating", W, "the rated point (120.0 MW, 0.0 Mvar at 13.8 kV): no stable operation at rated active power on the avr basis"}}},
		{"weak grid: rated point above the stable range", "x_external_pu: 0.2}", "x_external_pu: 2.5}",
			[]want{{54, "rating", W, "Mvar: the stability limit allows at most"}}}, // which limit and by how much; the numbers are the engine's
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := base + edit(t, regulated, tc.old, tc.new)
			f, ds := Parse("bad.yaml", []byte(s))
			if len(ds) != len(tc.want) {
				t.Fatalf("want %d diagnostics, got %d:\n%s", len(tc.want), len(ds), ds)
			}
			for i, w := range tc.want {
				d := ds[i]
				if d.Line != w.line || d.Field != w.field || d.Severity != w.sev || !strings.Contains(d.Message, w.text) {
					t.Errorf("got %s\nwant line %d field %s %v containing %q", d, w.line, w.field, w.sev, w.text)
				}
			}
			if !ds.HasErrors() && f.Unit("hydro-3").Model == nil {
				t.Errorf("no errors but no model")
			}
		})
	}
}
