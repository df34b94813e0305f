package fleet

import (
	"os"
	"strings"
	"testing"
)

// A unit's plausibility: block is read, zero fields take the defaults,
// and a bad value is reported at its line with what is allowed.
func TestPlausibilityBlock(t *testing.T) {
	example, err := os.ReadFile("../../deploy/examples/fleet.yaml")
	if err != nil {
		t.Fatal(err)
	}
	with := func(block string) string {
		return strings.Replace(string(example), "  - id: harrowmere-1\n", "  - id: harrowmere-1\n"+block, 1)
	}
	fl, ds := Parse("f.yaml", []byte(with("    plausibility: {voltage_min_pu: 0.7, field_max_pu: 2.5}\n")))
	if ds.HasErrors() {
		t.Fatalf("good block: %s", ds)
	}
	p := fl.Unit("harrowmere-1").Plausibility.Effective()
	if p.VoltageMinPU != 0.7 || p.FieldMaxPU != 2.5 || p.VoltageMaxPU != DefaultPlausibility.VoltageMaxPU || p.PowerMaxPU != DefaultPlausibility.PowerMaxPU {
		t.Errorf("effective %+v", p)
	}
	if q := fl.Unit("larchwater-2").Plausibility.Effective(); q != DefaultPlausibility {
		t.Errorf("a unit without the block: %+v, want the defaults", q)
	}
	for _, tc := range []struct{ block, want string }{
		{"    plausibility: {power_max_pu: 0.5}\n", "f.yaml:14: unit \"harrowmere-1\": plausibility.power_max_pu"},
		{"    plausibility: {voltage_min_pu: 1, voltage_max_pu: 1}\n", "must be below voltage_max_pu"},
		{"    plausibility: {speed_max: 2}\n", "speed_max"},
	} {
		_, ds := Parse("f.yaml", []byte(with(tc.block)))
		if !ds.HasErrors() || !strings.Contains(ds.String(), tc.want) {
			t.Errorf("%q: %s, want an error with %q", tc.block, ds, tc.want)
		}
	}
}
