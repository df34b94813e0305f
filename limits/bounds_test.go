package limits

import (
	"errors"
	"math"
	"testing"
)

// The practical limit against its definition, computed here from
// phasors: at q_practical the peak of P(delta), |E| |V_s| / (X + Xe) for
// a round rotor, exceeds p by exactly the margin m = 0.1 x rated MW
// (the margin construction fixed by the envelope contract; common
// practice, no single source).
func TestPracticalLimitDefinition(t *testing.T) {
	u := roundUnit(t, 2.0, 0.25, func(p *Params) { p.IfdRated = 3 })
	m := 0.1 * 0.85
	for _, p := range []float64{0.1, 0.4, 0.7} {
		b := u.Bounds(p, 1, 1, 1, nil)
		for _, w := range []*Unit{u, general(u)} {
			bb := w.Bounds(p, 1, 1, 1, nil)
			i := complex(p, -bb.Practical.V)
			e := 1 + complex(0, 2.0)*i
			vs := 1 - complex(0, 0.25)*i
			near(t, "P_max - p at q_practical", abs(e)*abs(vs)/2.25-p, m, 1e-8)
		}
		if !(b.Practical.V > b.Stability.V) {
			t.Errorf("p %v: practical %v not above theoretical %v", p, b.Practical.V, b.Stability.V)
		}
	}
}

// End region: piecewise linear through the maker's points, held beyond
// the ends, scaled by v^k.
func TestEndRegionCurve(t *testing.T) {
	u := roundUnit(t, 2.0, 0.2, func(p *Params) {
		p.IfdRated = 3
		p.EndRegion = &EndRegion{P: []float64{0, 0.4, 0.8}, Q: []float64{-0.5, -0.4, -0.2}, VoltageExponent: 2}
	})
	for _, tc := range []struct{ p, v, want float64 }{
		{0, 1, -0.5}, {0.2, 1, -0.45}, {0.6, 1, -0.3}, {0.8, 1, -0.2}, {0.9, 1, -0.2}, {0.2, 1.05, -0.45 * 1.05 * 1.05},
	} {
		near(t, "end-region q", u.Bounds(tc.p, tc.v, 1, 1, nil).EndRegion.V, tc.want, 1e-12)
	}
}

// Coolant table: linear between points, clamped at the ends, and the
// sample is flagged when outside.
func TestCoolantFactors(t *testing.T) {
	u := benchRound(t) // 200 -> (0.86, 0.88), 414 -> (1, 1)
	for _, tc := range []struct {
		c, arm, field float64
		inside        bool
	}{
		{200, 0.86, 0.88, true}, {414, 1, 1, true}, {307, 0.93, 0.94, true}, {100, 0.86, 0.88, false}, {500, 1, 1, false},
	} {
		a, f, in := u.CoolantFactors(tc.c)
		near(t, "armature factor", a, tc.arm, 1e-12)
		near(t, "field factor", f, tc.field, 1e-12)
		if in != tc.inside {
			t.Errorf("coolant %v: inside = %v, want %v", tc.c, in, tc.inside)
		}
	}
	r := u.Evaluate(Point{P: 0.5, Q: 0.2, V: 1, Coolant: 200, HasCoolant: true}, nil)
	near(t, "armature rating at 200", r.IMax, 0.86, 1e-12)
	near(t, "field rating at 200", r.IfdMax, 0.88*u.RatedFieldCurrent(), 1e-12)
}

// Infeasible points say which bound is missing, and never carry NaN.
func TestInfeasibleBounds(t *testing.T) {
	u := benchRound(t)
	r := u.Evaluate(Point{P: 1.2, Q: 0, V: 1}, nil) // beyond the armature circle
	if r.Feasible || r.QMax.OK || r.Infeasible != LimitArmature {
		t.Errorf("p beyond the armature circle: feasible %v, q_max %+v, infeasible %v", r.Feasible, r.QMax, r.Infeasible)
	}
	// A very weak grid: the practical margin cannot be met at full load.
	w := roundUnit(t, 2.0, 1.5, func(p *Params) { p.IfdRated = 2.2 })
	r = w.Evaluate(Point{P: 0.85, Q: 0.3, V: 1}, nil)
	if r.Feasible || r.QMin.OK || r.Infeasible != LimitStability {
		t.Errorf("weak grid at full load: feasible %v, q_min %+v, infeasible %v", r.Feasible, r.QMin, r.Infeasible)
	}
	for _, res := range []Result{r, u.Evaluate(Point{P: 1.2, Q: 0, V: 1}, nil)} {
		for _, b := range []Bound{res.QMax, res.QMin, res.Field, res.Stability, res.Practical, res.PMax} {
			if math.IsNaN(b.V) {
				t.Errorf("NaN in a bound: %+v", b)
			}
		}
	}
}

func TestNewRejects(t *testing.T) {
	good := benchRound(t).Params()
	for _, tc := range []struct {
		field string
		mod   func(*Params)
	}{
		{"machine.xd", func(p *Params) { p.Xd = 0 }},
		{"machine.xd", func(p *Params) { p.Xd = math.NaN() }},
		{"machine.xq", func(p *Params) { p.Xq = p.Xd + 0.1 }},
		{"machine.xq", func(p *Params) { p.Rotor = Salient }},
		{"machine.saturation.s12", func(p *Params) { p.S12 = p.S10 }},
		{"rating.power_factor", func(p *Params) { p.PowerFactor = 1.1 }},
		{"rating.power_factor", func(p *Params) { p.PowerFactor = 0 }},
		{"prime_mover.p_min_mw", func(p *Params) { p.PMin = p.PMax }},
		{"end_region.points[3]", func(p *Params) { p.EndRegion.P = []float64{0, 0.5, 0.5} }},
		{"coolant.points[2].at", func(p *Params) { p.Coolant.At = []float64{414, 200} }},
		{"grid.x_external_pu", func(p *Params) { p.Xe = -0.1 }},
	} {
		p := good
		e := *good.EndRegion
		c := *good.Coolant
		p.EndRegion, p.Coolant = &e, &c
		tc.mod(&p)
		_, err := New(p)
		var pe *ParamError
		if !errors.As(err, &pe) || pe.Field != tc.field {
			t.Errorf("want an error on %s, got %v", tc.field, err)
		}
	}
}
