package limits

import (
	"math"
	"math/rand/v2"
	"testing"

	"pgregory.net/rapid"
)

// Properties of the envelope, checked on random operating conditions.

type genCase struct {
	u    *Unit
	p, v float64
	c    float64
}

func drawCase(t *rapid.T, units []*Unit) genCase {
	u := units[rapid.IntRange(0, len(units)-1).Draw(t, "unit")]
	return genCase{
		u: u,
		p: rapid.Float64Range(0, u.p.PMax).Draw(t, "p"),
		v: rapid.Float64Range(0.9, 1.1).Draw(t, "v"),
		c: rapid.Float64Range(150, 450).Draw(t, "coolant"),
	}
}

func propUnits(t testing.TB) []*Unit {
	return []*Unit{benchRound(t), benchSalient(t), general(benchRound(t)),
		roundUnit(t, 1.9, 0.4, func(p *Params) { p.S10, p.S12 = 0.1, 0.35 }),
		// A UEL that crosses the stability limit: the limit binds at low p, the UEL above p = 0.2.
		roundUnit(t, 1.9, 0.4, func(p *Params) {
			p.S10, p.S12, p.MarginFraction = 0.1, 0.35, 0
			p.UEL = &UEL{Shape: UELPoints, P: []float64{0, 0.5, 1}, Q: []float64{-0.6, -0.3, -0.1}, K1: 2, K2: 2}
		})}
}

// q_min <= q_max wherever the point is feasible, and the bounds are the
// envelope: just inside q_max and q_min every limit that binds them has a
// non-negative margin, just outside the binding one is negative.
func TestPropertyMarginsChangeSignAtEnvelope(t *testing.T) {
	units := propUnits(t)
	rapid.Check(t, func(t *rapid.T) {
		c := drawCase(t, units)
		r := c.u.Evaluate(Point{P: c.p, Q: 0, V: c.v, F: 1, Coolant: c.c, HasCoolant: true}, nil)
		if !r.Feasible {
			return
		}
		if r.QMin.V > r.QMax.V {
			t.Fatalf("feasible but q_min %v > q_max %v", r.QMin.V, r.QMax.V)
		}
		const eps = 1e-6
		if r.QMax.V-r.QMin.V < 4*eps {
			return // a zero-width envelope (p on the armature rim): nothing lies inside
		}
		at := func(q float64) Result {
			return c.u.Evaluate(Point{P: c.p, Q: q, V: c.v, F: 1, Coolant: c.c, HasCoolant: true}, nil)
		}
		in, out := at(r.QMax.V-eps), at(r.QMax.V+eps)
		if m := in.Margins[r.QMaxLimit]; !(m.OK && m.V > 0) {
			t.Fatalf("just below q_max (%v): %v margin %+v, want > 0", r.QMax.V, r.QMaxLimit, m)
		}
		if m := out.Margins[r.QMaxLimit]; !(m.OK && m.V < 0) {
			t.Fatalf("just above q_max (%v): %v margin %+v, want < 0", r.QMax.V, r.QMaxLimit, m)
		}
		in, out = at(r.QMin.V+eps), at(r.QMin.V-eps)
		if m := in.Margins[r.QMinLimit]; !(m.OK && m.V > 0) {
			t.Fatalf("just above q_min (%v): %v margin %+v, want > 0", r.QMin.V, r.QMinLimit, m)
		}
		if m := out.Margins[r.QMinLimit]; !(m.OK && m.V < 0) {
			t.Fatalf("just below q_min (%v): %v margin %+v, want < 0", r.QMin.V, r.QMinLimit, m)
		}
	})
}

// The theoretical limit separates stable from unstable points: just
// above it K_s > 0 and E_f > 0, just below it one of them is <= 0.
func TestPropertyTheoreticalLimitSeparates(t *testing.T) {
	units := propUnits(t)
	rapid.Check(t, func(t *rapid.T) {
		c := drawCase(t, units)
		b := c.u.Bounds(c.p, c.v, 1, 1, nil)
		if !b.Stability.OK || !b.QMax.OK || b.Stability.V >= b.QMax.V-1e-6 {
			return
		}
		above := c.u.stab(c.p, b.Stability.V+1e-6, c.v)
		below := c.u.stab(c.p, b.Stability.V-1e-6, c.v)
		if !(above.ks > 0 && above.ef > 0) {
			t.Fatalf("just above the limit %v: K_s %v, E_f %v; want both > 0", b.Stability.V, above.ks, above.ef)
		}
		if !(below.ks <= 0 || below.ef <= 0) {
			t.Fatalf("just below the limit %v: K_s %v, E_f %v; want one <= 0", b.Stability.V, below.ks, below.ef)
		}
	})
}

// A salient-pole model with Xq = Xd is the round-rotor model: the
// two-reaction path (Xq a hair below Xd, salient) against the round one.
func TestPropertySalientWithEqualReactancesIsRound(t *testing.T) {
	pr := benchRound(t).Params()
	ps := pr
	ps.Rotor = Salient
	ps.Xq = pr.Xd * (1 - 1e-10)
	ur, us := benchRound(t), mustNew(t, ps)
	rapid.Check(t, func(t *rapid.T) {
		p := rapid.Float64Range(0, pr.PMax).Draw(t, "p")
		q := rapid.Float64Range(-0.6, 0.7).Draw(t, "q")
		v := rapid.Float64Range(0.9, 1.1).Draw(t, "v")
		a, b := ur.Evaluate(Point{P: p, Q: q, V: v}, nil), us.Evaluate(Point{P: p, Q: q, V: v}, nil)
		same := func(what string, x, y Bound) {
			if x.OK != y.OK || math.Abs(x.V-y.V) > 1e-6 {
				t.Fatalf("%s: round %+v, salient %+v", what, x, y)
			}
		}
		same("field", a.Field, b.Field)
		same("stability", a.Stability, b.Stability)
		same("practical", a.Practical, b.Practical)
		same("q_max", a.QMax, b.QMax)
		same("q_min", a.QMin, b.QMin)
		same("i_fd", some(a.IfdModel), some(b.IfdModel))
	})
}

// A coolant table whose factors are all 1 changes nothing.
func TestPropertyUnitCoolantIsNoCoolant(t *testing.T) {
	pa := benchRound(t).Params()
	pa.Coolant = &Coolant{At: []float64{100, 500}, Armature: []float64{1, 1}, Field: []float64{1, 1}}
	pb := pa
	pb.Coolant = nil
	ua, ub := mustNew(t, pa), mustNew(t, pb)
	rapid.Check(t, func(t *rapid.T) {
		pt := Point{P: rapid.Float64Range(0, 0.85).Draw(t, "p"), Q: rapid.Float64Range(-0.6, 0.7).Draw(t, "q"),
			V: rapid.Float64Range(0.9, 1.1).Draw(t, "v"), Coolant: rapid.Float64Range(0, 600).Draw(t, "c"), HasCoolant: true}
		a, b := ua.Evaluate(pt, nil), ub.Evaluate(pt, nil)
		a.CoolantOutside = false
		if a != b {
			t.Fatalf("unit coolant table changed the result:\n%+v\n%+v", a, b)
		}
	})
}

// Raising the terminal voltage never shrinks the armature circle.
func TestPropertyArmatureCircleGrowsWithVoltage(t *testing.T) {
	u := benchRound(t)
	rapid.Check(t, func(t *rapid.T) {
		p := rapid.Float64Range(0, 1).Draw(t, "p")
		v1 := rapid.Float64Range(0.85, 1.15).Draw(t, "v1")
		v2 := rapid.Float64Range(v1, 1.2).Draw(t, "v2")
		b1, b2 := u.Bounds(p, v1, 1, 1, nil), u.Bounds(p, v2, 1, 1, nil)
		if b1.ArmatureUp.OK && (!b2.ArmatureUp.OK || b2.ArmatureUp.V < b1.ArmatureUp.V || b2.ArmatureDown.V > b1.ArmatureDown.V) {
			t.Fatalf("p %v: armature at v %v %+v, at v %v %+v", p, v1, b1.ArmatureUp, v2, b2.ArmatureUp)
		}
	})
}

// walk returns a random walk of n samples over the whole chart of a unit
// with active-power bound pMax: steps of every size (mostly small, some
// jumps), touching p = 0 exactly and the edges of the voltage range.
func walk(n int, pMax float64, seed uint64) []Point {
	rng := rand.New(rand.NewPCG(seed, 7))
	pts := make([]Point, n)
	p, q, v := 0.5*pMax, 0.0, 1.0
	for i := range pts {
		switch k := rng.IntN(100); {
		case k < 3:
			p = 0 // exactly zero: the salient cold bracket's special case
		case k < 6:
			p, q, v = pMax*rng.Float64(), -0.8+1.4*rng.Float64(), 0.9+0.2*rng.Float64()
		default:
			p = math.Min(pMax, math.Max(0, p+0.01*rng.NormFloat64()))
			q = math.Min(0.6, math.Max(-0.8, q+0.01*rng.NormFloat64()))
			v = math.Min(1.1, math.Max(0.9, v+0.002*rng.NormFloat64()))
		}
		pts[i] = Point{P: p, Q: q, V: v, F: 1}
	}
	return pts
}

// hintUnits are the property units and weak-grid units (Xe up to 0.8 pu
// on the machine base, where the stability limit lies high and close to
// q_max), round and salient, with the default practical margin 0 (weak
// grids with a margin: TestHintDoesNotChangePractical).
func hintUnits(t testing.TB) []*Unit {
	us := propUnits(t)
	for _, xe := range []float64{0.5, 0.8} {
		us = append(us, roundUnit(t, 1.9, xe, func(p *Params) { p.IfdRated = 2.6; p.MarginFraction = 0 }),
			mustNew(t, Params{Rotor: Salient, Xd: 1.05, Xq: 0.68, Xl: 0.15, Xp: 0.2, PowerFactor: 0.9,
				FrequencyHz: 50, PMax: 0.9, Xe: xe, IfdRated: 2.2}))
	}
	return us
}

// A warm start changes the work done, never the answer: the warm (hint)
// path against the cold one, sample by sample, on the tracking telemetry
// and on random walks of 100,000 samples over the whole chart, weak grids
// and p = 0 included. The reference is the cold path of the same code;
// what is checked is that the two searches find the same root.
func TestHintDoesNotChangeResult(t *testing.T) {
	n := 100_000
	if testing.Short() {
		n = 10_000
	}
	for ui, u := range hintUnits(t) {
		var h Hint
		pts := append(tracking(3000), walk(n, u.p.PMax, uint64(ui+1))...)
		for i, pt := range pts {
			warm, cold := u.Evaluate(pt, &h), u.Evaluate(pt, nil)
			for _, x := range [][2]Bound{{warm.Field, cold.Field}, {warm.Stability, cold.Stability}, {warm.Practical, cold.Practical},
				{warm.QMin, cold.QMin}, {warm.QMax, cold.QMax}} {
				if x[0].OK != x[1].OK || math.Abs(x[0].V-x[1].V) > 1e-7 {
					t.Fatalf("unit %d, sample %d %+v: warm %+v, cold %+v", ui, i, pt, x[0], x[1])
				}
			}
			if warm.Binding != cold.Binding && math.Abs(warm.Margins[warm.Binding].V-cold.Margins[warm.Binding].V) > 1e-7 {
				t.Fatalf("unit %d, sample %d %+v: binding warm %v, cold %v", ui, i, pt, warm.Binding, cold.Binding)
			}
		}
	}
}

func mustNew(t testing.TB, p Params) *Unit {
	t.Helper()
	u, err := New(p)
	if err != nil {
		t.Fatal(err)
	}
	return u
}

// EvaluateSample followed by Complete is Evaluate, over whole trajectories
// (warm hints) and at independent points (cold).
func TestEvaluateSampleCompletes(t *testing.T) {
	same := func(t *testing.T, i int, a, b Result) {
		t.Helper()
		for _, x := range [][2]Bound{{a.Field, b.Field}, {a.QMax, b.QMax}, {a.QMin, b.QMin}, {a.Stability, b.Stability},
			{a.Practical, b.Practical}, {a.EndRegion, b.EndRegion}} {
			if x[0].OK != x[1].OK || math.Abs(x[0].V-x[1].V) > 1e-8 {
				t.Fatalf("point %d: sample path %+v, Evaluate %+v", i, x[0], x[1])
			}
		}
		for l := range a.Margins {
			if a.Margins[l].OK != b.Margins[l].OK || math.Abs(a.Margins[l].V-b.Margins[l].V) > 1e-8 {
				t.Fatalf("point %d: margin %v: %+v against %+v", i, Limit(l), a.Margins[l], b.Margins[l])
			}
		}
		if a.QMaxLimit != b.QMaxLimit || a.QMinLimit != b.QMinLimit || a.Feasible != b.Feasible ||
			a.Infeasible != b.Infeasible || a.Binding != b.Binding || a.QMaxPending {
			t.Fatalf("point %d: sample path %+v\nEvaluate %+v", i, a, b)
		}
	}
	for _, u := range propUnits(t) {
		var hs, he Hint
		deferred := 0
		for i, pt := range append(tracking(2000), spread(u, 2000)...) {
			a := u.EvaluateSample(pt, &hs)
			if a.QMaxPending {
				deferred++
			}
			u.Complete(&a, pt)
			same(t, i, a, u.Evaluate(pt, &he))
		}
		if deferred == 0 {
			t.Errorf("the sample path never deferred q_max")
		}
	}
}
