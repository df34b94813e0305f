package limits

import (
	"errors"
	"math"
	"testing"
)

// UEL curves against points computed by hand (coordination.md, "Curves"):
//
//	circle c = (0, 0.4), r = 1.05, k = 2:
//	  p 0.6, v 1:    q = 0.4 - sqrt(1.05^2 - 0.6^2) = 0.4 - sqrt(0.7425) = -0.461684397
//	  p 0.6, v 0.95: s = 0.9025, p/s = 0.664820, q = s (0.4 - sqrt(1.1025 - 0.441986)) = -0.372480157
//	  p 1.2, v 1:    |p - c_p| > r: no value
//	points (0, -0.5), (0.5, -0.4), (1, -0.2), k1 = k2 = 2:
//	  p 0.25, v 1:   halfway between the first two: -0.45
//	  p 0.605, v 1.1: x = 0.605/1.21 = 0.5, F = -0.4, q = 1.21 (-0.4) = -0.484
//	  p 1.5, v 1:    held beyond the end: -0.2
func TestUELForms(t *testing.T) {
	circle := &UEL{Shape: UELCircle, CenterQ: 0.4, Radius: 1.05, K: 2}
	points := &UEL{Shape: UELPoints, P: []float64{0, 0.5, 1}, Q: []float64{-0.5, -0.4, -0.2}, K1: 2, K2: 2}
	for _, tc := range []struct {
		c    *UEL
		p, v float64
		want float64
		ok   bool
	}{
		{circle, 0.6, 1, -0.4616843969807043, true},
		{circle, 0.6, 0.95, -0.37248015694018605, true},
		{circle, 1.2, 1, 0, false},
		{points, 0.25, 1, -0.45, true},
		{points, 0.605, 1.1, -0.484, true},
		{points, 1.5, 1, -0.2, true},
	} {
		b := tc.c.At(tc.p, tc.v)
		if b.OK != tc.ok {
			t.Errorf("shape %v p %v v %v: ok %v, want %v", tc.c.Shape, tc.p, tc.v, b.OK, tc.ok)
			continue
		}
		if tc.ok {
			near(t, "q_uel", b.V, tc.want, 1e-9)
		}
	}
}

// The UEL is part of the lower bound: q_min = max(armature, stability,
// end region, uel), named uel where it binds, with its margin q - q_uel
// (envelope.md, "The lower bound"; coordination.md, "Live").
func TestUELInLowerBound(t *testing.T) {
	// Round rotor, Xd 2, Xe 0.2, m = 0: the stability circle (textbook,
	// envelope.md) has centre (v^2/2)(1/Xe - 1/Xd) = 2.25 and radius
	// (v^2/2)(1/Xe + 1/Xd) = 2.75, so q_stab(0.3) = 2.25 - sqrt(2.75^2 - 0.09) = -0.4836;
	// the UEL circle above puts q_uel(0.3) = 0.4 - sqrt(1.1025 - 0.09) = -0.6062: stability binds;
	// a UEL raised by 0.3 pu (centre 0.7) puts it at -0.3062: the UEL binds.
	for _, tc := range []struct {
		cq      float64
		wantLim Limit
		wantQ   float64
	}{
		{0.4, LimitStability, 2.25 - math.Sqrt(2.75*2.75-0.09)},
		{0.7, LimitUEL, 0.7 - math.Sqrt(1.1025-0.09)},
	} {
		u := roundUnit(t, 2.0, 0.2, func(p *Params) {
			p.IfdRated, p.MarginFraction = 3, 0
			p.UEL = &UEL{Shape: UELCircle, CenterQ: tc.cq, Radius: 1.05, K: 2}
		})
		r := u.Evaluate(Point{P: 0.3, Q: 0.1, V: 1}, nil)
		if r.QMinLimit != tc.wantLim {
			t.Errorf("uel centre %v: q_min limit %v, want %v", tc.cq, r.QMinLimit, tc.wantLim)
		}
		near(t, "q_min", r.QMin.V, tc.wantQ, 1e-8)
		near(t, "uel margin", r.Margins[LimitUEL].V, 0.1-(tc.cq-math.Sqrt(1.1025-0.09)), 1e-12)
		s := u.EvaluateSample(Point{P: 0.3, Q: 0.1, V: 1}, nil)
		if s.QMinLimit != tc.wantLim || math.Abs(s.QMin.V-tc.wantQ) > 1e-8 {
			t.Errorf("uel centre %v: sample path q_min %+v by %v", tc.cq, s.QMin, s.QMinLimit)
		}
	}
	// Without a UEL there is no uel margin.
	if m := roundUnit(t, 2.0, 0.2, nil).Evaluate(Point{P: 0.3, Q: 0.1, V: 1}, nil).Margins[LimitUEL]; m.OK {
		t.Errorf("uel margin without a UEL: %+v", m)
	}
}

// Prime-mover margin min(p_max - p, p - p_min)/p_rated: negative above
// p_max, below p_min and in reverse power (envelope.md, "Margins").
// Numbers by hand with p_max 0.85, p_min 0.24, p_rated 0.85.
func TestPrimeMoverMargin(t *testing.T) {
	u := benchRound(t)
	for _, tc := range []struct{ p, want float64 }{
		{0.5, (0.5 - 0.24) / 0.85}, // p_min nearer
		{0.8, (0.85 - 0.8) / 0.85},
		{0.1, (0.1 - 0.24) / 0.85},     // below p_min: outside
		{-0.05, (-0.05 - 0.24) / 0.85}, // reverse power: outside
		{0.9, (0.85 - 0.9) / 0.85},
	} {
		r := u.Evaluate(Point{P: tc.p, Q: 0.1, V: 1}, nil)
		near(t, "prime-mover margin", r.Margins[LimitPrimeMover].V, tc.want, 1e-12)
	}
}

// The binding limit is the chart limit nearest the point by distance in
// pu of rated MVA (envelope.md, "Binding limit"). The distances are
// computed here from the closed forms of an unsaturated round rotor
// (ra = 0): armature v - sqrt(p^2 + q^2); field circle, centre
// (0, -v^2/Xd), radius v E/Xd; stability circle, centre
// (0, (v^2/2)(1/Xe - 1/Xd)), radius (v^2/2)(1/Xe + 1/Xd); the prime mover
// min(p_max - p, p - p_min).
func TestBindingDistance(t *testing.T) {
	const xd, xe, e, pMax, pMin = 2.0, 0.3, 2.4, 0.9, 0.2
	u := roundUnit(t, xd, xe, func(p *Params) {
		p.IfdRated, p.MarginFraction, p.PMax, p.PMin, p.Xl, p.Xp = e, 0, pMax, pMin, 0.15, 0.15
	})
	n := 0
	for p := 0.0; p <= 0.95; p += 0.05 {
		for q := -0.6; q <= 0.8; q += 0.05 {
			v := 1.0
			dist := map[Limit]float64{
				LimitArmature:   v - math.Hypot(p, q),
				LimitField:      -v*v/xd + math.Sqrt(v*v*e*e/(xd*xd)-p*p) - q,
				LimitStability:  q - (v*v/2*(1/xe-1/xd) - math.Sqrt(math.Pow(v*v/2*(1/xe+1/xd), 2)-p*p)),
				LimitPrimeMover: math.Min(pMax-p, p-pMin),
			}
			want, best := NoLimit, math.Inf(1)
			for l, d := range dist {
				if d < best {
					want, best = l, d
				}
			}
			r := u.Evaluate(Point{P: p, Q: q, V: v}, nil)
			if !r.Feasible {
				continue
			}
			n++
			// Ties within the root tolerance may go either way.
			if r.Binding != want && math.Abs(dist[r.Binding]-best) > 1e-6 {
				t.Errorf("p %.2f q %.2f: binding %v, want %v (distances %v)", p, q, r.Binding, want, dist)
			}
		}
	}
	if n < 100 {
		t.Errorf("only %d feasible points checked", n)
	}
}

// The field margin takes the larger of the measured and the model field
// current when the sample is QUESTIONABLE or the two disagree beyond the
// mismatch threshold (envelope.md, "Margins"): 1 - i_fd/i_fd_max by hand.
func TestFieldMarginDoubtfulMeasurement(t *testing.T) {
	u := benchRound(t)
	base := Point{P: 0.6, Q: 0.2, V: 1}
	model := u.FieldCurrent(0.6, 0.2, 1)
	max := u.RatedFieldCurrent()
	for _, tc := range []struct {
		name string
		mod  func(*Point)
		ifd  float64
	}{
		{"no measurement", func(*Point) {}, model},
		{"good, agrees", func(p *Point) { p.Ifd, p.IfdMeasured, p.IfdMismatch = 0.95*model, true, 0.1 }, 0.95 * model},
		{"good, reads low beyond the threshold", func(p *Point) { p.Ifd, p.IfdMeasured, p.IfdMismatch = 0.8*model, true, 0.1 }, model},
		{"good, reads high beyond the threshold", func(p *Point) { p.Ifd, p.IfdMeasured, p.IfdMismatch = 1.2*model, true, 0.1 }, 1.2 * model},
		{"questionable, reads low", func(p *Point) { p.Ifd, p.IfdMeasured, p.IfdDoubtful = 0.95*model, true, true }, model},
		{"questionable, reads high", func(p *Point) { p.Ifd, p.IfdMeasured, p.IfdDoubtful = 1.05*model, true, true }, 1.05 * model},
		{"no threshold", func(p *Point) { p.Ifd, p.IfdMeasured = 0.5*model, true }, 0.5 * model},
	} {
		pt := base
		tc.mod(&pt)
		r := u.Evaluate(pt, nil)
		near(t, tc.name, r.Margins[LimitField].V, 1-tc.ifd/max, 1e-12)
	}
}

// No critical clearing time for a point that is not steady-state stable
// on the manual basis (envelope.md, "Transient stability margin"): below
// the textbook stability circle of a round rotor.
func TestCriticalClearingTimeOnlyWhenStable(t *testing.T) {
	u := roundUnit(t, 2.0, 0.2, func(p *Params) { p.XdTransient, p.InertiaHS, p.IfdRated = 0.3, 4, 3 })
	qs := 2.25 - math.Sqrt(2.75*2.75-0.25) // circle centre 2.25, radius 2.75 at p = 0.5
	if b := u.CriticalClearingTime(0.5, qs+0.01, 1); !b.OK {
		t.Errorf("stable point: no clearing time")
	}
	if b := u.CriticalClearingTime(0.5, qs-0.01, 1); b.OK {
		t.Errorf("unstable point: clearing time %v", b.V)
	}
}

// A salient-pole unit at exactly p = 0 has the limit of p -> 0: with
// K_s = a + 2b > 0 at delta = 0, the limit is E_f = 0, that is
// q = -v^2/Xd (E_f = v + Xd q/v at p = 0; two-reaction theory). The cold
// search used to close on q = -v^2/Xq, where E_Q = 0.
func TestSalientLimitAtZeroPower(t *testing.T) {
	for _, tc := range []struct{ xd, xq, xe, v float64 }{
		{0.859, 0.557, 0.862, 0.961}, {1.49, 0.731, 0.437, 1.052}, {1.124, 0.906, 0.095, 1.016}, {1.05, 0.68, 0.18, 1},
	} {
		u := salientUnit(t, tc.xd, tc.xq, tc.xe)
		want := -tc.v * tc.v / tc.xd
		for _, p := range []float64{0, 3e-5} { // 3e-5 pu: 0.01 MW of a 330 MVA unit
			near(t, "salient stability limit near p = 0", u.StabilityLimit(p, tc.v).V, want, 1e-4)
		}
	}
}

// New reports every problem at once, in the fleet file's spelling, and
// checks s12 > 1.2 s10 (the quadratic saturation form needs it; envelope.md).
func TestNewReportsEveryProblem(t *testing.T) {
	p := benchRound(t).Params()
	p.EndRegion, p.Coolant = nil, nil
	p.Xe, p.PowerFactor, p.S12, p.ZetaMin = -1, 1.2, 1.1*p.S10, 1
	_, err := New(p)
	got := map[string]bool{}
	for _, pe := range ParamErrors(err) {
		got[pe.Field] = true
	}
	for _, f := range []string{"grid.x_external_pu", "rating.power_factor", "machine.saturation.s12", "stability.zeta_min"} {
		if !got[f] {
			t.Errorf("no error on %s; got %v", f, err)
		}
	}
	// A lead-lag stage with t2 = 0 is a pure derivative: refused.
	q := benchRound(t).Params()
	q.Exciter = &Exciter{KA: 200, TAS: 0.02}
	q.Stabilizer = &Stabilizer{K: 10, TWS: 10, T1S: 0.2, T2S: 0, T3S: 0.2, T4S: 0.05}
	_, err = New(q)
	if pes := ParamErrors(err); len(pes) != 1 || pes[0].Field != "stabilizer.t2_s" {
		t.Errorf("t2 = 0: %v", err)
	}
	var pe *ParamError
	if !errors.As(err, &pe) {
		t.Errorf("errors.As finds no ParamError in %v", err)
	}
	// A power factor of 1.0 is a valid rating.
	q = benchRound(t).Params()
	q.PowerFactor = 1
	if _, err := New(q); err != nil {
		t.Errorf("power factor 1.0: %v", err)
	}
}

// The unit keeps copies of the curves it is given.
func TestNewCopiesItsInputs(t *testing.T) {
	p := benchRound(t).Params()
	p.EndRegion = &EndRegion{P: []float64{0, 0.4, 0.85}, Q: []float64{-0.5, -0.4, -0.25}}
	p.UEL = &UEL{Shape: UELPoints, P: []float64{0, 1}, Q: []float64{-0.5, -0.3}}
	p.Exciter = &Exciter{KA: 200, TAS: 0.02}
	u := mustNew(t, p)
	before := u.Evaluate(Point{P: 0.5, Q: 0, V: 1}, nil)
	p.EndRegion.Q[1], p.UEL.Q[0], p.Exciter.KA = 0.3, 0.4, 1
	after := u.Evaluate(Point{P: 0.5, Q: 0, V: 1}, nil)
	if before.EndRegion != after.EndRegion || before.UEL != after.UEL || u.Params().Exciter.KA != 200 {
		t.Errorf("the unit changed with its caller's slices: %+v %+v against %+v %+v", before.EndRegion, before.UEL, after.EndRegion, after.UEL)
	}
}

// Evaluate and the per-sample path do not allocate, with a UEL and a
// measured field current too (the house rule; BenchmarkEvaluate* show it
// as well).
func TestEvaluateDoesNotAllocate(t *testing.T) {
	p := benchSalient(t).Params()
	p.UEL = &UEL{Shape: UELPoints, P: []float64{0, 0.5, 1}, Q: []float64{-0.5, -0.4, -0.2}, K1: 2, K2: 2}
	u := mustNew(t, p)
	pts := tracking(256)
	var h Hint
	i := 0
	n := testing.AllocsPerRun(500, func() {
		pt := pts[i%len(pts)]
		pt.Ifd, pt.IfdMeasured, pt.IfdMismatch = 2, true, 0.1
		r := u.EvaluateSample(pt, &h)
		u.Complete(&r, pt)
		sink = u.Evaluate(pt, &h)
		i++
	})
	if n != 0 {
		t.Errorf("%v allocations per sample, want 0", n)
	}
}
