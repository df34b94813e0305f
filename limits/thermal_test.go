package limits

import (
	"math"
	"testing"
)

// IEEE C50.13 short-time thermal capability (from memory): the table
// points and the law (x^2 - 1) t = K. Holding each tabled current for its
// tabled time must bring the accumulator to the limit, within the 2 % by
// which the published table departs from the law.
func TestThermalC5013Table(t *testing.T) {
	for _, tc := range []struct {
		winding string
		k       float64
		xPct    float64
		tS      float64
	}{
		{"armature", ArmatureK, 226, 10}, {"armature", ArmatureK, 154, 30},
		{"armature", ArmatureK, 130, 60}, {"armature", ArmatureK, 116, 120},
		{"field", FieldK, 209, 10}, {"field", FieldK, 146, 30},
		{"field", FieldK, 125, 60}, {"field", FieldK, 113, 120},
	} {
		var th Thermal
		x := tc.xPct / 100
		for range int(tc.tS * 10) {
			th.Advance(x, 0.1)
		}
		if used := th.Used(tc.k); math.Abs(used-1) > 0.02 {
			t.Errorf("%s %v %% for %v s: H/K = %.4f, want 1 within 2 %%", tc.winding, tc.xPct, tc.tS, used)
		}
		left, ok := Thermal{}.TimeLeft(x, tc.k)
		if !ok || math.Abs(left-tc.tS)/tc.tS > 0.02 {
			t.Errorf("%s %v %%: time allowed from cold = %.2f s, table %v s", tc.winding, tc.xPct, left, tc.tS)
		}
	}
}

// Below rating the winding cools at (1 - x^2) dt and H never goes below 0.
func TestThermalCoolsAndFloors(t *testing.T) {
	var th Thermal
	th.Advance(1.46, 10) // (1.46^2 - 1) * 10 = 11.316 s
	near(t, "H after 10 s at 146 %", th.H, (1.46*1.46-1)*10, 1e-12)
	th.Advance(0.8, 10) // cools by 0.36 * 10
	near(t, "H after cooling", th.H, (1.46*1.46-1)*10-3.6, 1e-12)
	th.Advance(0.5, 1e4)
	if th.H != 0 {
		t.Errorf("H = %v, want floored at 0", th.H)
	}
	for _, dt := range []float64{-1, math.NaN(), math.Inf(1)} {
		before := th
		th.Advance(2, dt)
		if th != before {
			t.Errorf("Advance with dt %v changed the state", dt)
		}
	}
	if _, ok := th.TimeLeft(1.0, FieldK); ok {
		t.Errorf("TimeLeft at rated current must report no limit")
	}
}
