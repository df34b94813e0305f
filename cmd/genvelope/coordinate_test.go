package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/limits"
)

const demoFleet = "../../service/demo/demo-fleet.yaml"

// keysOf returns the sorted keys of a JSON object.
func keysOf(t *testing.T, v any, where string) []string {
	t.Helper()
	m, ok := v.(map[string]any)
	if !ok {
		t.Fatalf("%s: not a JSON object: %v", where, v)
	}
	var ks []string
	for k := range m {
		ks = append(ks, k)
	}
	sort.Strings(ks)
	return ks
}

// TestCoordinateJSONShape: the JSON is exactly the shape of
// coordination.md, {"units": [{"unit", "checks": [{"name", "status",
// "margin", "margin_unit", "worst": {"v_pu", "p_mw"} or null, "detail"}]}]},
// the checks in the contract's order; and the demo fleet's one deliberate
// miscoordination is found (exit 1).
func TestCoordinateJSONShape(t *testing.T) {
	code, out, errOut := runCLI("coordinate", "--fleet", demoFleet, "--format", "json")
	if code != exitFailure {
		t.Fatalf("exit %d, want 1 (a check fails); stderr %s", code, errOut)
	}
	var doc any
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if got := keysOf(t, doc, "top"); !reflect.DeepEqual(got, []string{"units"}) {
		t.Fatalf("top-level keys %v, want [units]", got)
	}
	order := []string{"uel_within_capability", "uel_above_stability", "uel_before_loss_of_field",
		"oel_before_field_capability", "field_protection_after_oel", "scl_before_armature_capability",
		"vhz_limiter_within_capability", "vhz_limiter_before_relay"}
	var fails []string
	for _, u := range doc.(map[string]any)["units"].([]any) {
		if got := keysOf(t, u, "unit"); !reflect.DeepEqual(got, []string{"checks", "unit"}) {
			t.Fatalf("unit keys %v", got)
		}
		id := u.(map[string]any)["unit"].(string)
		checks := u.(map[string]any)["checks"].([]any)
		if len(checks) != len(order) {
			t.Fatalf("%s: %d checks", id, len(checks))
		}
		for i, c := range checks {
			if got := keysOf(t, c, "check"); !reflect.DeepEqual(got, []string{"detail", "margin", "margin_unit", "name", "status", "worst"}) {
				t.Fatalf("check keys %v", got)
			}
			cm := c.(map[string]any)
			if cm["name"] != order[i] {
				t.Errorf("%s: check %d is %v, want %s", id, i, cm["name"], order[i])
			}
			switch cm["status"] {
			case "pass", "fail":
				if _, ok := cm["margin"].(float64); !ok {
					t.Errorf("%s %s: margin %v is not a number", id, order[i], cm["margin"])
				}
			case "not_applicable":
				if cm["margin"] != nil {
					t.Errorf("%s %s: a not_applicable margin must be null", id, order[i])
				}
			default:
				t.Errorf("%s %s: status %v", id, order[i], cm["status"])
			}
			if w := cm["worst"]; w != nil {
				if got := keysOf(t, w, "worst"); !reflect.DeepEqual(got, []string{"p_mw", "v_pu"}) {
					t.Errorf("worst keys %v", got)
				}
			}
			if cm["status"] == "fail" {
				fails = append(fails, id+" "+cm["name"].(string))
			}
		}
	}
	if want := []string{"tillmoor-gt1 uel_before_loss_of_field"}; !reflect.DeepEqual(fails, want) {
		t.Errorf("failing checks %v, want only the deliberate %v", fails, want)
	}
	if !strings.Contains(errOut, "genvelope advises only") {
		t.Error("the caution is missing beside the JSON")
	}
	if names := limits.CheckNames(); !reflect.DeepEqual(names[:], order) {
		t.Errorf("checks in limits %v, want %v", names, order)
	}
}

// TestCoordinateExitCodes: 0 when nothing fails, 1 when a check fails,
// 2 on bad input; text and html outputs.
func TestCoordinateExitCodes(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	data, err := os.ReadFile(demoFleet)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(bad, []byte(strings.Replace(string(data), "delay_s: 0.5}", "delay_s: -1}", 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	html := filepath.Join(dir, "r.html")
	cases := []struct {
		args []string
		code int
		out  string
	}{
		{[]string{"--fleet", demoFleet, "--unit", "ashgrove-1"}, exitOK, "uel_before_loss_of_field        pass"},
		{[]string{"--fleet", demoFleet, "--unit", "tillmoor-gt1", "--format", "text"}, exitFailure, "uel_before_loss_of_field        fail"},
		{[]string{"--fleet", demoFleet, "--format", "html", "--out", html}, exitFailure, "wrote " + html},
		{[]string{"--fleet", bad}, exitUsage, ""},
		{[]string{"--fleet", demoFleet, "--unit", "nope"}, exitUsage, ""},
		{[]string{"--fleet", demoFleet, "--format", "pdf"}, exitUsage, ""},
	}
	for _, c := range cases {
		code, out, errOut := runCLI(append([]string{"coordinate"}, c.args...)...)
		if code != c.code || !strings.Contains(out, c.out) {
			t.Errorf("%v: exit %d, want %d; stdout %q; stderr %q", c.args, code, c.code, out, errOut)
		}
	}
	page, err := os.ReadFile(html)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"SHA-256", "genvelope advises only", `id="summary"`, "chart-rx", "chart-vhz"} {
		if !strings.Contains(string(page), want) {
			t.Errorf("the HTML report lacks %q", want)
		}
	}
}
