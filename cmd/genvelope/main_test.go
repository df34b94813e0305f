package main

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"encoding/xml"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/service/chart"
	"github.com/genvelope/genvelope/service/fleet"
)

var example = filepath.Join("..", "..", "deploy", "examples", "fleet.yaml")

const (
	minFleet  = "testdata/min.yaml"
	warnFleet = "testdata/warn.yaml"
	badFleet  = "testdata/bad.yaml"
)

// runCLI runs genvelope in process.
func runCLI(args ...string) (code int, stdout, stderr string) {
	var o, e bytes.Buffer
	code = run(args, &o, &e)
	return code, o.String(), e.String()
}

func TestExitCodesAndMessages(t *testing.T) {
	eval := func(extra ...string) []string {
		return append([]string{"evaluate", "--fleet", example, "--unit", "harrowmere-1", "--p-mw", "300", "--q-mvar", "100", "--v-kv", "20"}, extra...)
	}
	tests := []struct {
		name   string
		args   []string
		code   int
		stdout []string // parts of standard output
		stderr []string // parts of standard error
	}{
		{name: "no arguments", args: nil, code: 2, stderr: []string{"Commands:", "validate", "evaluate", "envelope"}},
		{name: "help", args: []string{"help"}, code: 0, stdout: []string{"validate", "evaluate", "envelope", fleet.Caution}},
		{name: "--help", args: []string{"--help"}, code: 0, stdout: []string{"Commands:"}},
		{name: "help evaluate", args: []string{"help", "evaluate"}, code: 0, stdout: []string{"Usage: genvelope evaluate", "-p-mw MW", "-q-mvar Mvar", "-v-kv kV", fleet.Caution}},
		{name: "help envelope", args: []string{"help", "envelope"}, code: 0, stdout: []string{"-format format", "-points points", fleet.Caution}},
		{name: "help unknown", args: []string{"help", "fly"}, code: 2, stderr: []string{`unknown command "fly"`}},
		{name: "evaluate --help", args: []string{"evaluate", "--help"}, code: 0, stdout: []string{"Usage: genvelope evaluate", fleet.Caution}},
		{name: "envelope -h", args: []string{"envelope", "-h"}, code: 0, stdout: []string{"Usage: genvelope envelope", fleet.Caution}},
		{name: "unknown command", args: []string{"launch"}, code: 2, stderr: []string{`unknown command "launch"`, "validate, evaluate, envelope"}},
		{name: "unknown flag", args: []string{"validate", "--flet", example}, code: 2, stderr: []string{"flag provided but not defined: -flet", "genvelope help validate"}},
		{name: "stray argument", args: []string{"validate", "--fleet", example, "extra"}, code: 2, stderr: []string{`unexpected argument "extra"`}},
		{name: "validate without fleet", args: []string{"validate"}, code: 2, stderr: []string{"missing --fleet FILE"}},
		{name: "validate missing file", args: []string{"validate", "--fleet", "testdata/absent.yaml"}, code: 2, stderr: []string{"testdata/absent.yaml: no such file"}},
		{name: "validate example", args: []string{"validate", "--fleet", example}, code: 0, stdout: []string{"fleet.yaml: 3 units, OK\n"}},
		{name: "validate warnings only", args: []string{"validate", "--fleet", warnFleet}, code: 0,
			stdout: []string{`testdata/warn.yaml:5: unit "plain-1": field.rated_a: warning: the nameplate rated field current 2000 A`, "1 units, OK with 1 warning(s)"}},
		{name: "validate errors", args: []string{"validate", "--fleet", badFleet}, code: 2,
			stdout: []string{`testdata/bad.yaml:3: unit "plain-1": rating.power_factor: must be in (0, 1], got 1.8`, `testdata/bad.yaml:4: unit "plain-1": machine.colour: unknown key`, "2 error(s)"}},
		{name: "evaluate NaN", args: []string{"evaluate", "--fleet", example, "--unit", "harrowmere-1", "--p-mw", "NaN", "--q-mvar", "0", "--v-kv", "20"}, code: 2,
			stderr: []string{`invalid value "NaN" for flag -p-mw: must be a finite number`}},
		{name: "evaluate Inf", args: eval("--q-mvar", "+Inf"), code: 2, stderr: []string{`flag -q-mvar: must be a finite number`}},
		{name: "evaluate unparsable", args: eval("--v-kv", "20kV"), code: 2, stderr: []string{`invalid value "20kV" for flag -v-kv: not a number`}},
		{name: "evaluate bad field current", args: eval("--field-a", "x"), code: 2, stderr: []string{`flag -field-a: not a number`}},
		{name: "evaluate bad format", args: eval("--format", "xml"), code: 2, stderr: []string{`flag -format: must be one of text, json`}},
		{name: "evaluate missing p", args: []string{"evaluate", "--fleet", example, "--unit", "harrowmere-1", "--q-mvar", "0", "--v-kv", "20"}, code: 2, stderr: []string{"missing --p-mw"}},
		{name: "evaluate zero voltage", args: eval("--v-kv", "0"), code: 2, stderr: []string{"--v-kv must be a positive voltage"}},
		{name: "evaluate zero frequency", args: eval("--frequency-hz", "0"), code: 2, stderr: []string{"--frequency-hz must be a positive frequency"}},
		{name: "evaluate missing unit", args: []string{"evaluate", "--fleet", example, "--p-mw", "1", "--q-mvar", "0", "--v-kv", "20"}, code: 2,
			stderr: []string{"missing --unit ID", "harrowmere-1, larchwater-2, brindle-gt3"}},
		{name: "evaluate unknown unit", args: []string{"evaluate", "--fleet", example, "--unit", "harrowmere-9", "--p-mw", "1", "--q-mvar", "0", "--v-kv", "20"}, code: 2,
			stderr: []string{`unknown unit "harrowmere-9"`, "known units: harrowmere-1, larchwater-2, brindle-gt3"}},
		{name: "evaluate bad fleet", args: []string{"evaluate", "--fleet", badFleet, "--unit", "plain-1", "--p-mw", "1", "--q-mvar", "0", "--v-kv", "11"}, code: 2,
			stderr: []string{`testdata/bad.yaml:3: unit "plain-1": rating.power_factor`, "2 error(s); fix the fleet file first"}},
		{name: "evaluate warnings pass", args: []string{"evaluate", "--fleet", warnFleet, "--unit", "plain-1", "--p-mw", "50", "--q-mvar", "0", "--v-kv", "11"}, code: 0,
			stdout: []string{"plain-1", fleet.Caution}, stderr: []string{"warning: the nameplate rated field current"}},
		{name: "evaluate text", args: eval(), code: 0,
			stdout: []string{"harrowmere-1 (Harrowmere unit 1), site harrowmere", "P 300.0 MW, Q +100.0 Mvar, V 20.00 kV (1.000 pu)", "within limits", "field current limit", "stator end-region limit", fleet.Caution}},
		{name: "evaluate text outside", args: eval("--q-mvar", "-150"), code: 0, stdout: []string{"OUTSIDE LIMITS: Q below q_min (uel limit) by", "uel exceeded by", "end_region exceeded by"}},
		{name: "evaluate text infeasible", args: []string{"evaluate", "--fleet", minFleet, "--unit", "plain-1", "--p-mw", "105", "--q-mvar", "0", "--v-kv", "11"}, code: 0,
			stdout: []string{"NO CONTINUOUS OPERATION at this P and V: the armature limit"}},
		{name: "evaluate coolant without table", args: []string{"evaluate", "--fleet", example, "--unit", "larchwater-2", "--p-mw", "50", "--q-mvar", "0", "--v-kv", "13.8", "--coolant", "20"}, code: 0,
			stderr: []string{`unit "larchwater-2" has no coolant table; --coolant is ignored`}},
		{name: "envelope missing format", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1"}, code: 2, stderr: []string{"missing --format json|csv|svg"}},
		{name: "envelope bad format", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "png"}, code: 2, stderr: []string{"must be one of json, csv, svg"}},
		{name: "envelope one point", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "csv", "--points", "1"}, code: 2, stderr: []string{"--points must be between 2 and 10001"}},
		{name: "envelope zero voltage", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "csv", "--v-pu", "0"}, code: 2, stderr: []string{"--v-pu must be a voltage in pu"}},
		{name: "envelope NaN voltage", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "csv", "--v-pu", "nan"}, code: 2, stderr: []string{"flag -v-pu: must be a finite number"}},
		{name: "envelope coolant outside", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "csv", "--coolant", "50"}, code: 0,
			stderr: []string{"coolant 50 kPa is outside unit \"harrowmere-1\"'s table", fleet.Caution}},
		{name: "envelope unwritable", args: []string{"envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "csv", "--out", "testdata/no/such/dir/x.csv"}, code: 1,
			stderr: []string{"genvelope envelope:", "x.csv"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			code, stdout, stderr := runCLI(tc.args...)
			if code != tc.code {
				t.Errorf("exit code %d, want %d\nstdout:\n%s\nstderr:\n%s", code, tc.code, stdout, stderr)
			}
			for _, s := range tc.stdout {
				if !strings.Contains(stdout, s) {
					t.Errorf("stdout lacks %q:\n%s", s, stdout)
				}
			}
			for _, s := range tc.stderr {
				if !strings.Contains(stderr, s) {
					t.Errorf("stderr lacks %q:\n%s", s, stderr)
				}
			}
			if strings.Contains(stderr, "goroutine ") || strings.Contains(stderr, "panic:") {
				t.Errorf("stderr looks like a crash:\n%s", stderr)
			}
		})
	}
}

// evaluateJSONKeys are the keys the evaluate JSON must always have.
var evaluateJSONKeys = []string{
	"unit", "v_pu", "armature_current_pu", "field_current_model_a", "load_angle_deg",
	"q_max_mvar", "q_max_limit", "q_min_mvar", "q_min_limit", "q_stability_mvar",
	"q_practical_stability_mvar", "p_max_mw", "q_headroom_up_mvar", "q_headroom_down_mvar",
	"margins", "binding_limit", "feasible", "infeasible_limit", "zone", "critical_clearing_time_s",
	"q_field_mvar", "q_armature_up_mvar", "q_armature_down_mvar", "q_end_region_mvar",
	"volts_per_hertz_pu", "coolant_outside_table", "caution", "q_uel_mvar", "stability_basis", "rotor_mode",
}

func evaluateJSON(t *testing.T, args ...string) map[string]any {
	t.Helper()
	code, stdout, stderr := runCLI(append(append([]string{"evaluate"}, args...), "--format", "json")...)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	if strings.Contains(stdout, "NaN") || strings.Contains(stdout, "Inf") {
		t.Fatalf("JSON holds NaN or Inf:\n%s", stdout)
	}
	var m map[string]any
	if err := json.Unmarshal([]byte(stdout), &m); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, stdout)
	}
	for _, k := range evaluateJSONKeys {
		if _, ok := m[k]; !ok {
			t.Errorf("JSON lacks key %q", k)
		}
	}
	return m
}

func TestEvaluateJSON(t *testing.T) {
	tests := []struct {
		name  string
		args  []string
		null  []string       // keys that must be null
		set   []string       // keys that must not be null
		equal map[string]any // keys with an exact value
		check func(t *testing.T, m map[string]any)
	}{
		{
			name: "inside, every curve",
			args: []string{"--fleet", example, "--unit", "harrowmere-1", "--p-mw", "300", "--q-mvar", "100", "--v-kv", "20", "--coolant", "414"},
			null: []string{"infeasible_limit", "field_current_measured_a"},
			set:  []string{"q_max_mvar", "q_min_mvar", "q_end_region_mvar", "critical_clearing_time_s", "coolant"},
			equal: map[string]any{"unit": "harrowmere-1", "feasible": true, "zone": "A", "q_max_limit": "field",
				"v_pu": 1.0, "coolant_outside_table": false, "coolant_quantity": "hydrogen_pressure_kpa", "caution": fleet.Caution},
			check: func(t *testing.T, m map[string]any) {
				qMax, qMin := m["q_max_mvar"].(float64), m["q_min_mvar"].(float64)
				if up := m["q_headroom_up_mvar"].(float64); math.Abs(up-(qMax-100)) > 1e-9 {
					t.Errorf("headroom up %v, want q_max - q = %v", up, qMax-100)
				}
				if down := m["q_headroom_down_mvar"].(float64); math.Abs(down-(100-qMin)) > 1e-9 {
					t.Errorf("headroom down %v, want q - q_min = %v", down, 100-qMin)
				}
				margins := m["margins"].(map[string]any)
				for _, l := range []string{"armature", "field", "stability", "end_region", "prime_mover", "volts_per_hertz"} {
					if v, ok := margins[l]; !ok || v == nil {
						t.Errorf("margin %s = %v, want a number", l, v)
					}
				}
			},
		},
		{
			name:  "absent curves and clearing time are null",
			args:  []string{"--fleet", minFleet, "--unit", "plain-1", "--p-mw", "60", "--q-mvar", "10", "--v-kv", "11"},
			null:  []string{"q_end_region_mvar", "critical_clearing_time_s", "coolant", "coolant_quantity", "infeasible_limit"},
			equal: map[string]any{"feasible": true},
			check: func(t *testing.T, m map[string]any) {
				if v := m["margins"].(map[string]any)["end_region"]; v != nil {
					t.Errorf("end_region margin %v, want null", v)
				}
			},
		},
		{
			name:  "infeasible above the armature limit",
			args:  []string{"--fleet", minFleet, "--unit", "plain-1", "--p-mw", "105", "--q-mvar", "0", "--v-kv", "11"},
			null:  []string{"q_max_mvar", "q_min_mvar", "q_headroom_up_mvar", "q_headroom_down_mvar", "q_armature_up_mvar"},
			equal: map[string]any{"feasible": false, "infeasible_limit": "armature", "within_limits": false},
		},
		{
			name:  "measured field current and frequency",
			args:  []string{"--fleet", minFleet, "--unit", "plain-2", "--p-mw", "40", "--q-mvar", "5", "--v-kv", "6.6", "--field-a", "500", "--frequency-hz", "55"},
			set:   []string{"critical_clearing_time_s", "field_current_measured_a"},
			equal: map[string]any{"frequency_hz": 55.0, "field_current_measured_a": 500.0, "zone": "outside"},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			m := evaluateJSON(t, tc.args...)
			for _, k := range tc.null {
				if v, ok := m[k]; !ok || v != nil {
					t.Errorf("%s = %v (present %v), want null", k, v, ok)
				}
			}
			for _, k := range tc.set {
				if m[k] == nil {
					t.Errorf("%s is null, want a value", k)
				}
			}
			for k, want := range tc.equal {
				if m[k] != want {
					t.Errorf("%s = %v, want %v", k, m[k], want)
				}
			}
			if tc.check != nil {
				tc.check(t, m)
			}
		})
	}
}

func TestEnvelopeCSV(t *testing.T) {
	code, stdout, stderr := runCLI("envelope", "--fleet", example, "--unit", "larchwater-2", "--format", "csv", "--points", "11")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	rows, err := csv.NewReader(strings.NewReader(stdout)).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	const header = "p_mw,q_max_mvar,q_max_limit,q_min_mvar,q_min_limit,q_field_mvar,q_armature_up_mvar,q_armature_down_mvar,q_stability_mvar,q_practical_stability_mvar,q_end_region_mvar,q_uel_mvar"
	if got := strings.Join(rows[0], ","); got != header {
		t.Errorf("header\n got %s\nwant %s", got, header)
	}
	if len(rows) != 12 {
		t.Fatalf("%d rows, want header and 11 points", len(rows))
	}
	if rows[1][0] != "0.0000" || rows[11][0] != "110.0000" {
		t.Errorf("P runs from %s to %s, want 0 to p_max 110", rows[1][0], rows[11][0])
	}
	for _, r := range rows[1:] {
		if r[10] != "" {
			t.Errorf("no end-region curve, but the column holds %q", r[10])
		}
		if r[2] == "" || r[4] == "" {
			t.Errorf("binding limit names missing in %v", r)
		}
	}
	if !strings.Contains(stderr, fleet.Caution) {
		t.Error("csv: the caution is not on standard error")
	}
}

func TestEnvelopeJSON(t *testing.T) {
	code, stdout, stderr := runCLI("envelope", "--fleet", example, "--unit", "brindle-gt3", "--format", "json", "--points", "5", "--coolant", "45", "--v-pu", "1.02")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	var out struct {
		Unit            string           `json:"unit"`
		VPU             float64          `json:"v_pu"`
		Coolant         *float64         `json:"coolant"`
		CoolantQuantity string           `json:"coolant_quantity"`
		Points          []map[string]any `json:"points"`
		Caution         string           `json:"caution"`
	}
	if err := json.Unmarshal([]byte(stdout), &out); err != nil {
		t.Fatal(err)
	}
	if out.Unit != "brindle-gt3" || out.VPU != 1.02 || out.Coolant == nil || *out.Coolant != 45 || out.CoolantQuantity != "ambient_c" || out.Caution != fleet.Caution {
		t.Errorf("header fields wrong: %+v", out)
	}
	if len(out.Points) != 5 {
		t.Fatalf("%d points, want 5", len(out.Points))
	}
	for _, p := range out.Points {
		for _, k := range []string{"p_mw", "q_max_mvar", "q_max_limit", "q_min_mvar", "q_min_limit", "q_field_mvar",
			"q_armature_up_mvar", "q_armature_down_mvar", "q_stability_mvar", "q_practical_stability_mvar", "q_end_region_mvar"} {
			if _, ok := p[k]; !ok {
				t.Errorf("point lacks %q", k)
			}
		}
		if p["q_end_region_mvar"] != nil {
			t.Errorf("no end-region curve, got %v", p["q_end_region_mvar"])
		}
	}
}

// svgText returns every text of the SVG, checking that it is well-formed XML.
func svgText(t *testing.T, data []byte) string {
	t.Helper()
	dec := xml.NewDecoder(bytes.NewReader(data))
	var b strings.Builder
	root := ""
	for {
		tok, err := dec.Token()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("the SVG is not well-formed XML: %v", err)
		}
		switch x := tok.(type) {
		case xml.StartElement:
			if root == "" {
				root = x.Name.Local
			}
		case xml.CharData:
			b.Write(x)
			b.WriteByte('\n')
		}
	}
	if root != "svg" {
		t.Fatalf("root element %q, want svg", root)
	}
	return b.String()
}

func TestEnvelopeSVG(t *testing.T) {
	out := filepath.Join(t.TempDir(), "h1.svg")
	code, stdout, stderr := runCLI("envelope", "--fleet", example, "--unit", "harrowmere-1", "--format", "svg", "--out", out, "--coolant", "310")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	if !strings.Contains(stdout, "wrote "+out) || !strings.Contains(stdout, fleet.Caution) {
		t.Errorf("stdout:\n%s", stdout)
	}
	data, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	text := svgText(t, data)
	for _, want := range []string{
		chart.LabelArmature, chart.LabelField, chart.LabelStability, chart.LabelPractical,
		chart.LabelEndRegion, chart.LabelPMax, chart.LabelPMin,
		"harrowmere-1 capability at 20.00 kV (1.000 pu), coolant 310 kPa",
		"active power P (MW)", "reactive power Q (Mvar)",
		"p_max 335 MW", "p_min 120 MW",
	} {
		if !strings.Contains(text, want) {
			t.Errorf("the SVG lacks %q", want)
		}
	}
	// The caution is wrapped over lines; compare without line breaks.
	if !strings.Contains(strings.Join(strings.Fields(text), " "), fleet.Caution) {
		t.Error("the SVG lacks the caution")
	}

	// To standard output, for a unit without an end-region curve.
	code, stdout, stderr = runCLI("envelope", "--fleet", example, "--unit", "larchwater-2", "--format", "svg")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	text = svgText(t, []byte(stdout))
	if strings.Contains(text, chart.LabelEndRegion) {
		t.Error("a unit without an end-region curve has none in the legend")
	}
}
