package fleet

import (
	"fmt"
	"math"
	"path/filepath"
	"testing"

	"github.com/genvelope/genvelope/limits"
)

// The per-sample path (Evaluate with a Hint, which on the avr stability
// basis reads the unit's table) answers within 0.002 pu of the direct
// computation (Evaluate without a Hint: the Routh-Hurwitz scan confirmed
// by eigenvalues) on every unit of the example and demo fleets, over a
// dense grid of p in [0, p_max] and v in [0.9, 1.1] (the limits contract,
// envelope.md v2, "The linearized model for the avr basis").
func TestFleetAVRFastAnswerAgrees(t *testing.T) {
	for _, file := range []string{
		filepath.Join("..", "..", "deploy", "examples", "fleet.yaml"),
		filepath.Join("..", "demo", "demo-fleet.yaml"),
	} {
		fastAnswerAgrees(t, file, fastDiffers)
	}
}

// TestFleetAVRDesignsFastAnswerAgrees is TestFleetAVRFastAnswerAgrees on
// the load harness's regulators (testdata/avr-designs.yaml: the example
// fleet's three units with each of test/load's four exciter designs),
// whose stable sets have islands below the limit over much of the chart
// (the cells the per-sample path checks with detectInterval), the
// practical limit with a margin and q_min included. On the example's
// first unit (margin 0.10) P_max - p - m changes sign within 0.001 pu of
// q_stability as well as far above it: the rule of the practical margin
// (envelope.md, "Practical margin") answers q_stability on one side of
// that root and the far root on the other, so where the two paths'
// q_stability (within 0.002 pu of each other) straddle it their practical
// limits differ by the jump. fastDiffers tells those points by the rule
// itself and counts them; everywhere else they agree within 0.002 pu.
func TestFleetAVRDesignsFastAnswerAgrees(t *testing.T) {
	jumps := fastAnswerAgrees(t, filepath.Join("testdata", "avr-designs.yaml"), fastDiffers)
	t.Logf("avr-designs.yaml: %d grid points on a jump of the practical limit", jumps)
}

// fastAnswerAgrees compares the per-sample answer with the direct one on
// every avr unit of the fleet file over a grid of p in [0, p_max] (121
// points) and v in [0.9, 1.1] (21 points), by differs; it returns the
// number of points that differs found on a jump of the practical limit.
func fastAnswerAgrees(t *testing.T, file string, differs func(m *limits.Unit, pt limits.Point, d, f limits.Bounds) (string, bool)) (jumps int) {
	t.Helper()
	f, diags, err := Load(file)
	if err != nil {
		t.Fatalf("%s: %v", file, err)
	}
	if diags.HasErrors() {
		t.Fatalf("%s: %v", file, diags)
	}
	for _, id := range f.IDs() {
		u := f.Unit(id)
		m := u.Model
		pMax := m.Params().PMax
		var h limits.Hint
		bad, unitJumps := 0, 0
		if id == "larchwater-2" {
			// The reported point: 90 MW at 13.9 kV (the table gave -267
			// Mvar against the direct computation's -201 Mvar).
			pt := limits.Point{P: 90 / u.Base.MVA, V: 13.9 / u.Base.KV}
			if msg, _ := differs(m, pt, m.Evaluate(pt, nil).Bounds, m.Evaluate(pt, &h).Bounds); msg != "" {
				t.Errorf("larchwater-2 at 90 MW, 13.9 kV: %s", msg)
			}
		}
		for iv := 0; iv <= 20; iv++ {
			v := 0.9 + 0.2*float64(iv)/20
			for ip := 0; ip <= 120; ip++ {
				p := pMax * float64(ip) / 120
				pt := limits.Point{P: p, V: v}
				d := m.Evaluate(pt, nil)
				s := m.Evaluate(pt, &h)
				msg, jump := differs(m, pt, d.Bounds, s.Bounds)
				if jump {
					unitJumps++
				}
				if msg != "" {
					bad++
					if bad <= 5 {
						t.Errorf("%s %s p %.4f pu (%.1f MW) v %.4f pu: %s", filepath.Base(file), id, p, p*u.Rating.MVA, v, msg)
					}
				}
			}
		}
		if bad > 5 {
			t.Errorf("%s %s: %d points differ in all", filepath.Base(file), id, bad)
		}
		if unitJumps > 0 {
			t.Logf("%s %s: %d of 2541 points on a jump of the practical limit", filepath.Base(file), id, unitJumps)
		}
		jumps += unitJumps
	}
	return jumps
}

// fastDiffers compares the direct bounds d with the per-sample ones f at
// point pt of unit m: q_max, the moved top and q_stability within
// 0.002 pu, present or absent alike. q_stability is compared below the
// armature lower bound too: the stability margin shows it there (the
// direct scan reports it at its floor, 1 pu below that bound, when
// stable down to there).
//
// The practical limit of each is the rule of the practical margin
// applied at its own q_stability and top (limits.Unit.PracticalLimit,
// to 1e-6 pu; the rule itself is checked against an independent scan in
// limits, TestPracticalRuleIndependent). The two then agree within
// 0.002 pu, and q_min with them, except on a jump: where the rule at the
// per-sample q_stability, on the direct top, differs from the direct
// answer by more than that, the difference is the rule's discontinuity
// (a root of P_max - p - m between the two q_stability values), jump is
// true, and q_min may differ only by the practical limit that binds it.
func fastDiffers(m *limits.Unit, pt limits.Point, d, f limits.Bounds) (msg string, jump bool) {
	pairs := [][2]limits.Bound{{d.QMax, f.QMax}, {d.StabilityTop, f.StabilityTop}, {d.Stability, f.Stability}}
	names := [...]string{"q_max", "stability top", "q_stability"}
	for i, x := range pairs {
		if !near(x[0], x[1], 0.002) {
			return fmt.Sprintf("%s: direct %+v, per-sample %+v", names[i], x[0], x[1]), false
		}
	}
	for _, x := range []struct {
		name string
		b    limits.Bounds
	}{{"direct", d}, {"per-sample", f}} {
		var rule limits.Bound
		if x.b.Stability.OK && x.b.QMax.OK {
			rule = m.PracticalLimit(pt.P, pt.V, x.b.Stability.V, x.b.QMax.V)
		}
		if !near(x.b.Practical, rule, 1e-6) {
			return fmt.Sprintf("%s practical limit %+v, the rule at its q_stability %+v gives %+v", x.name, x.b.Practical, x.b.Stability, rule), false
		}
	}
	if near(d.Practical, f.Practical, 0.002) {
		if !near(d.QMin, f.QMin, 0.002) {
			return fmt.Sprintf("q_min: direct %+v, per-sample %+v", d.QMin, f.QMin), false
		}
		return "", false
	}
	var moved limits.Bound
	if f.Stability.OK && d.QMax.OK {
		moved = m.PracticalLimit(pt.P, pt.V, f.Stability.V, d.QMax.V)
	}
	if near(moved, d.Practical, 0.002) {
		return fmt.Sprintf("practical limit: direct %+v, per-sample %+v (q_stability %+v, %+v), not a jump of the rule", d.Practical, f.Practical, d.Stability, f.Stability), false
	}
	if near(d.QMin, f.QMin, 0.002) {
		return "", true
	}
	// q_min differs: only through a practical limit that binds it.
	for _, b := range []limits.Bounds{d, f} {
		if b.QMinLimit == limits.LimitStability && near(b.QMin, b.Practical, 0) {
			return "", true
		}
	}
	return fmt.Sprintf("q_min on a jump of the practical limit: direct %+v (%v), per-sample %+v (%v)", d.QMin, d.QMinLimit, f.QMin, f.QMinLimit), true
}

// near says whether a and b are both absent or both present within tol.
func near(a, b limits.Bound, tol float64) bool {
	return a.OK == b.OK && (!a.OK || math.Abs(a.V-b.V) <= tol)
}
