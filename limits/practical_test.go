package limits

import (
	"math"
	"math/cmplx"
	"testing"
)

// The practical limit with a margin (envelope.md, "Practical margin"):
// the lowest q of the stable interval at which P_max(E_f, V_s) - p >= m,
// found by scanning upward from q_stability in steps of 0.02 pu and
// bisecting. The checks here compute P_max from the spec's phasor
// equations and apply the scan with their own code.

// indepPeakExcess is P_max(E_f, V_s) - p - m at (p, q, v) from the
// envelope contract's phasor equations (envelope.md, "Steady-state
// stability"; two-reaction theory, from memory), written here without
// the package's functions: I = (p - jq)/v, E_Q = V + jXq I, V_s = V - jXe I,
// E_f = |E_Q| + (Xd - Xq) I_d with I_d the component of I along the d
// axis (90 degrees behind E_Q), and P(delta) = (E_f V_s/X_dS) sin(delta)
// + (V_s^2/2)(1/X_qS - 1/X_dS) sin(2 delta), whose peak over [0, pi] is
// found by sampling delta every 0.5 degrees and a golden-section
// refinement (no closed form).
func indepPeakExcess(pr Params, p, v, m float64) func(q float64) float64 {
	return func(q float64) float64 {
		i := complex(p, -q) / complex(v, 0)
		eq := complex(v, 0) + complex(0, pr.Xq)*i
		vs := cmplx.Abs(complex(v, 0) - complex(0, pr.Xe)*i)
		ef := cmplx.Abs(eq)
		if ef > 0 {
			d := eq / complex(ef, 0) * complex(0, -1) // unit vector of the d axis
			ef += (pr.Xd - pr.Xq) * (real(i)*real(d) + imag(i)*imag(d))
		}
		xdS, xqS := pr.Xd+pr.Xe, pr.Xq+pr.Xe
		pd := func(delta float64) float64 {
			return ef*vs/xdS*math.Sin(delta) + 0.5*vs*vs*(1/xqS-1/xdS)*math.Sin(2*delta)
		}
		best := 0.0
		for k := 0; k <= 360; k++ {
			if pd(float64(k)*math.Pi/360) > pd(best) {
				best = float64(k) * math.Pi / 360
			}
		}
		a, b := math.Max(best-math.Pi/360, 0), math.Min(best+math.Pi/360, math.Pi)
		const g = 0.6180339887498949
		for range 60 {
			x1, x2 := b-g*(b-a), a+g*(b-a)
			if pd(x1) < pd(x2) {
				a = x1
			} else {
				b = x2
			}
		}
		return math.Max(pd(best), pd(0.5*(a+b))) - p - m
	}
}

// indepRule is the spec's rule, plainly: hf(qs) >= 0 gives qs; else look
// at qs + 0.02 k (and top last) for the first point with hf >= 0 and
// bisect against the one below it to 1e-12 pu; none: absent.
func indepRule(hf func(float64) float64, qs, top float64) Bound {
	if hf(qs) >= 0 {
		return some(qs)
	}
	lo := qs
	for k := 1; lo < top; k++ {
		hi := math.Min(qs+0.02*float64(k), top)
		if hf(hi) >= 0 {
			for hi-lo > 1e-12 {
				if mid := 0.5 * (lo + hi); hf(mid) >= 0 {
					hi = mid
				} else {
					lo = mid
				}
			}
			return some(hi)
		}
		lo = hi
	}
	return Bound{}
}

// rootsAbove counts the sign changes of hf on [qs, top], sampled every
// 0.002 pu.
func rootsAbove(hf func(float64) float64, qs, top float64) int {
	n := 0
	prev := hf(qs) >= 0
	for q := qs + 0.002; q < top+0.002; q += 0.002 {
		s := hf(math.Min(q, top)) >= 0
		if s != prev {
			n++
		}
		prev = s
	}
	return n
}

// The rule against the independent scan of the same function at chosen
// points of both bases (the direct path, Bounds, at its own q_stability
// and top, and the per-sample path, Evaluate with a hint, at its own),
// among them points where P_max - p - m has two roots above q_stability:
// a first root followed by a second below the top (the margin is met on
// a band of q only, so a search on [q_stability, top] that compares the
// ends finds no sign change: the code before the rule called such points
// infeasible on the avr basis), and points whose q_stability already
// meets the margin (on the avr basis, below the manual limit) with two
// roots above it, where the rule answers q_stability itself.
func TestPracticalRuleIndependent(t *testing.T) {
	us := practicalUnits(t)
	for _, tc := range []struct {
		unit  int
		p, v  float64
		roots int // sign changes of P_max - p - m above q_stability, at least; 0 not checked
		why   string
	}{
		{0, 0.1, 1, 0, "round, manual"},
		{0, 0.45, 0.95, 0, "round, manual"},
		{0, 0.8, 1.05, 0, "round, manual"},
		{1, 0.15, 0.9, 2, "round, manual, weak grid: the margin is met on a band [r1, r2] below the top"},
		{1, 0.6, 1, 0, "round, manual, weak grid"},
		{2, 0.3, 1, 0, "salient, manual"},
		{2, 0.8, 0.92, 0, "salient, manual"},
		{3, 0.5, 0.95, 0, "salient, manual, weak grid"},
		{3, 0.05, 1.1, 0, "salient, manual, weak grid"},
		{4, 0.3 * 335 / 390, 0.9, 2, "avr, high gain: q_stability below the manual limit meets the margin"},
		{4, 0.85 * 335 / 390, 1.05, 2, "avr, high gain: q_stability below the manual limit meets the margin"},
		{5, 0.3, 1, 0, "avr"},
		{5, 0.63, 1, 0, "avr, no stabilizer"},
		{6, 0.4, 1, 0, "avr, salient"},
		{6, 0.54, 1, 2, "avr, salient: q_stability below the manual limit meets the margin"},
		{7, 0.15, 0.9, 2, "avr, weak grid: a band [r1, r2] below the top (the old search said infeasible)"},
		{7, 0.5, 1, 0, "avr, weak grid"},
	} {
		u := us[tc.unit]
		pr := u.Params()
		hf := indepPeakExcess(pr, tc.p, tc.v, pr.MarginFraction*pr.PowerFactor)
		var h Hint
		for _, path := range []struct {
			name string
			b    Bounds
		}{{"direct", u.Bounds(tc.p, tc.v, 1, 1, nil)}, {"per-sample", u.Evaluate(Point{P: tc.p, V: tc.v, F: 1}, &h).Bounds}} {
			b := path.b
			if !b.Stability.OK || !b.QMax.OK {
				t.Fatalf("%s p %v v %v (%s): no stable interval: %+v", path.name, tc.p, tc.v, tc.why, b)
			}
			want := indepRule(hf, b.Stability.V, b.QMax.V)
			if b.Practical.OK != want.OK || math.Abs(b.Practical.V-want.V) > 1e-6 {
				t.Errorf("%s p %v v %v (%s): practical %+v, the scan of the spec's rule %+v (q_stability %v, top %v)",
					path.name, tc.p, tc.v, tc.why, b.Practical, want, b.Stability.V, b.QMax.V)
			}
			if n := rootsAbove(hf, b.Stability.V, b.QMax.V); n < tc.roots {
				t.Errorf("%s p %v v %v (%s): %d roots above q_stability, want at least %d", path.name, tc.p, tc.v, tc.why, n, tc.roots)
			}
		}
	}
}

// practicalUnits are units with a practical margin on both bases,
// strong and weak grids (invented parameters of plausible size, not
// check values): 0 benchRound, 1 a round rotor on Xe = 0.8, 2
// benchSalient, 3 a salient unit on Xe = 0.5 (m = 0.05), 4 and 5 the
// example fleet's first unit on the avr basis with a high-gain static
// exciter and stabilizer and with a moderate one without, 6 benchSalient
// on the avr basis (m = 0.05), 7 unit 1 on the avr basis.
func practicalUnits(t testing.TB) []*Unit {
	weakRound := roundUnit(t, 1.9, 0.8, func(p *Params) { p.IfdRated = 2.6 })
	weakSal := mustNew(t, Params{Rotor: Salient, Xd: 1.05, Xq: 0.68, Xl: 0.15, Xp: 0.2, PowerFactor: 0.9,
		FrequencyHz: 50, PMax: 0.9, Xe: 0.5, IfdRated: 2.2, MarginFraction: 0.05})
	avr := func(p Params, ka, ta, tr float64, pss bool, m float64) *Unit {
		p.Basis, p.MarginFraction = BasisAVR, m
		if p.Td0TransientS == 0 {
			p.Td0TransientS, p.InertiaHS, p.XdTransient = 7, 4, 0.3
		}
		p.Exciter = &Exciter{KA: ka, TAS: ta, TRS: tr}
		if pss {
			p.Stabilizer = &Stabilizer{K: 10, TWS: 3, T1S: 0.15, T2S: 0.03, T3S: 0.08, T4S: 0.03}
		}
		return mustNew(t, p)
	}
	high := Params{Rotor: Round, Xd: 2.05, Xq: 2.05, Xl: 0.17, Xp: 0.19, Ra: 0.0018, XdTransient: 0.27,
		InertiaHS: 4.8, Td0TransientS: 8.2, S10: 0.11, S12: 0.38, PowerFactor: 0.85, FrequencyHz: 50,
		PMax: 335.0 / 390, PMin: 120.0 / 390, Xe: 0.18, IfdRated: 3}
	return []*Unit{benchRound(t), weakRound, benchSalient(t), weakSal,
		avr(high, 200, 0.02, 0.02, true, 0.1), avr(high, 100, 0.03, 0.015, false, 0.1),
		avr(benchSalient(t).Params(), 200, 0.02, 0.02, true, 0.05), avr(weakRound.Params(), 200, 0.02, 0.02, true, 0.1)}
}

// On a round rotor on the manual basis the closed form (roundPractical)
// is the rule: against the independent scan and the iterative path of
// the same unit (general), over the chart, and just below the active
// power at which the margin can no longer be met, where the band of q
// that meets it narrows below the scan's step: there it may fall
// between two of the scan's points, and the rule (so the closed form
// too) calls the point infeasible. Both cases occur among those points.
func TestRoundPracticalIsTheRule(t *testing.T) {
	skipped, caught := 0, 0
	for _, u := range []*Unit{benchRound(t), practicalUnits(t)[1]} {
		pr := u.Params()
		m := pr.MarginFraction * pr.PowerFactor
		check := func(p, v float64) (Bound, Bounds) {
			b, g := u.Bounds(p, v, 1, 1, nil), general(u).Bounds(p, v, 1, 1, nil)
			if !b.Stability.OK || !b.QMax.OK || b.Stability.V >= b.QMax.V {
				return Bound{}, b
			}
			want := indepRule(indepPeakExcess(pr, p, v, m), b.Stability.V, b.QMax.V)
			for _, x := range [][2]Bound{{b.Practical, want}, {g.Practical, want}} {
				if x[0].OK != x[1].OK || math.Abs(x[0].V-x[1].V) > 1e-6 {
					t.Fatalf("Xe %v p %v v %v: closed form %+v, iterative %+v, the scan of the rule %+v (q_stability %v, top %v)",
						pr.Xe, p, v, b.Practical, g.Practical, want, b.Stability.V, b.QMax.V)
				}
			}
			return want, b
		}
		for v := 0.9; v <= 1.1001; v += 0.1 {
			for p := 0.0; p <= pr.PMax; p += 0.02 {
				check(p, v)
			}
			// The highest p at which P_max - p - m reaches 0 somewhere on
			// the stable interval: the peak over q by golden section (a
			// search aid only), the edge by bisection on p.
			peak := func(p float64) (float64, Bounds) {
				b := u.Bounds(p, v, 1, 1, nil)
				if !b.Stability.OK || !b.QMax.OK || b.Stability.V >= b.QMax.V {
					return math.Inf(-1), b
				}
				hf := indepPeakExcess(pr, p, v, m)
				lo, hi := b.Stability.V, b.QMax.V
				for range 80 {
					x1, x2 := hi-0.618*(hi-lo), lo+0.618*(hi-lo)
					if hf(x1) < hf(x2) {
						lo = x1
					} else {
						hi = x2
					}
				}
				return hf(0.5 * (lo + hi)), b
			}
			pLo, pHi := 0.0, pr.PMax
			if f, _ := peak(pHi); f >= 0 {
				continue // the margin is met up to p_max at this voltage
			}
			for range 60 {
				if f, _ := peak(0.5 * (pLo + pHi)); f >= 0 {
					pLo = 0.5 * (pLo + pHi)
				} else {
					pHi = 0.5 * (pLo + pHi)
				}
			}
			for _, d := range []float64{1e-7, 3e-7, 1e-6, 3e-6, 1e-5, 2e-5, 3e-5, 5e-5, 1e-4, 3e-4} {
				p := pLo - d
				if f, _ := peak(p); f < 0 {
					continue
				}
				if want, _ := check(p, v); want.OK {
					caught++
				} else {
					skipped++
				}
			}
		}
	}
	if skipped == 0 || caught == 0 {
		t.Errorf("near the edge of the margin: %d bands skipped by the scan, %d met; want both", skipped, caught)
	}
	t.Logf("near the edge of the margin: %d bands skipped by the scan, %d met", skipped, caught)
}

// hintMarginUnits are weak-grid units (Xe 0.5 and 0.8 pu) with a
// practical margin of 0.05 and 0.10, round and salient, on both bases
// (invented parameters of plausible size, not check values).
func hintMarginUnits(t testing.TB) []*Unit {
	round := func(xe, m float64) Params {
		return roundUnit(t, 1.9, xe, func(p *Params) { p.IfdRated, p.MarginFraction = 2.6, m }).Params()
	}
	salient := func(xe, m float64) Params {
		return Params{Rotor: Salient, Xd: 1.05, Xq: 0.68, Xl: 0.15, Xp: 0.2, PowerFactor: 0.9,
			FrequencyHz: 50, PMax: 0.9, Xe: xe, IfdRated: 2.2, MarginFraction: m}
	}
	avr := func(p Params, ka, ta float64, pss bool) *Unit {
		p.Basis, p.Td0TransientS, p.InertiaHS, p.XdTransient, p.DampingPU = BasisAVR, 7, 4, 0.3, 1
		p.Exciter = &Exciter{KA: ka, TAS: ta, TRS: 0.02}
		if pss {
			p.Stabilizer = &Stabilizer{K: 10, TWS: 3, T1S: 0.15, T2S: 0.03, T3S: 0.08, T4S: 0.03}
		}
		return mustNew(t, p)
	}
	return []*Unit{mustNew(t, round(0.5, 0.10)), mustNew(t, round(0.8, 0.05)),
		mustNew(t, salient(0.5, 0.10)), mustNew(t, salient(0.8, 0.05)),
		avr(round(0.5, 0.10), 200, 0.02, true), avr(round(0.8, 0.05), 100, 0.03, false),
		avr(salient(0.5, 0.05), 200, 0.02, true), avr(salient(0.8, 0.10), 50, 0.05, false)}
}

// With a practical margin the answer does not depend on the hint
// history: random walks of 100,000 samples in all (12,500 a unit; -short
// 1,250) over the whole chart of weak-grid units with m = 0.05 and 0.10
// on both bases, p = 0 included. At every sample Evaluate and
// EvaluateSample with the walk's hints give the practical limit and
// q_min of Evaluate with a fresh hint, to 1e-6 pu: the rule is a
// function of p, v, q_stability and the top (and on the avr basis the
// per-sample q_stability is the table's, which takes no hint). Against
// Evaluate without a hint (the direct path): on the manual basis the
// same, to 1e-6 pu; on the avr basis, every tenth sample, q_stability
// within the table's 0.002 pu, the practical limit the rule at each
// path's own q_stability (PracticalLimit, itself checked against an
// independent scan in TestPracticalRuleIndependent), and the two within
// 0.002 pu except where the rule jumps between the two q_stability
// values (counted).
func TestHintDoesNotChangePractical(t *testing.T) {
	n := 12_500
	if testing.Short() {
		n = 1_250
	}
	same := func(a, b Bound, tol float64) bool { return a.OK == b.OK && (!a.OK || math.Abs(a.V-b.V) <= tol) }
	for ui, u := range hintMarginUnits(t) {
		var h, hs Hint
		jumps, direct := 0, 0
		for i, pt := range walk(n, u.p.PMax, uint64(100+ui)) {
			warm, sample, fresh := u.Evaluate(pt, &h), u.EvaluateSample(pt, &hs), u.Evaluate(pt, &Hint{})
			for _, x := range []struct {
				name string
				r    Result
			}{{"Evaluate with the walk's hint", warm}, {"EvaluateSample with the walk's hint", sample}} {
				if !same(x.r.Practical, fresh.Practical, 1e-6) || !same(x.r.QMin, fresh.QMin, 1e-6) {
					t.Fatalf("unit %d sample %d %+v: %s: practical %+v, q_min %+v; with a fresh hint %+v, %+v",
						ui, i, pt, x.name, x.r.Practical, x.r.QMin, fresh.Practical, fresh.QMin)
				}
			}
			if u.p.Basis != BasisAVR {
				cold := u.Evaluate(pt, nil)
				if !same(warm.Practical, cold.Practical, 1e-6) || !same(warm.QMin, cold.QMin, 1e-6) {
					t.Fatalf("unit %d sample %d %+v: practical %+v, q_min %+v; without a hint %+v, %+v",
						ui, i, pt, warm.Practical, warm.QMin, cold.Practical, cold.QMin)
				}
				continue
			}
			if i%10 != 0 {
				continue
			}
			direct++
			d := u.Evaluate(pt, nil)
			if !same(d.Stability, warm.Stability, 0.002) {
				t.Fatalf("unit %d sample %d %+v: q_stability direct %+v, per-sample %+v", ui, i, pt, d.Stability, warm.Stability)
			}
			for _, r := range []Result{d, warm} {
				var rule Bound
				if r.Stability.OK && r.QMax.OK {
					rule = u.PracticalLimit(pt.P, pt.V, r.Stability.V, r.QMax.V)
				}
				if !same(r.Practical, rule, 1e-6) {
					t.Fatalf("unit %d sample %d %+v: practical %+v, the rule at its q_stability %+v gives %+v", ui, i, pt, r.Practical, r.Stability, rule)
				}
			}
			if same(d.Practical, warm.Practical, 0.002) {
				continue
			}
			var moved Bound
			if warm.Stability.OK && d.QMax.OK {
				moved = u.PracticalLimit(pt.P, pt.V, warm.Stability.V, d.QMax.V)
			}
			if same(moved, d.Practical, 0.002) {
				t.Fatalf("unit %d sample %d %+v: practical direct %+v, per-sample %+v, not a jump of the rule", ui, i, pt, d.Practical, warm.Practical)
			}
			jumps++
		}
		if u.p.Basis == BasisAVR {
			t.Logf("unit %d (avr): %d of %d direct comparisons on a jump of the practical limit", ui, jumps, direct)
		}
	}
}

// Nonsense operating points with a practical margin end (the scan is
// bounded), on both bases, and the rule adds no NaN: a present practical
// limit is NaN only where q_stability is (the round rotor's closed forms
// at an infinite voltage, like the field limit, are left to the
// service's input checks).
func TestPracticalNonsensePoints(t *testing.T) {
	for ui, u := range practicalUnits(t) {
		var h Hint
		for _, pt := range []Point{{P: 0.5, V: math.Inf(1)}, {P: 0.5, V: 1e300}, {P: math.Inf(1), V: 1}, {P: 0.5, Q: math.Inf(1), V: 1},
			{P: math.NaN(), V: 1}, {P: 0.5, V: math.NaN()}, {P: 0.5, V: 0}, {P: -0.5, V: 1}, {P: 3, V: 1}} {
			for _, r := range []Result{u.Evaluate(pt, nil), u.Evaluate(pt, &h), u.EvaluateSample(pt, &h)} {
				if r.Practical.OK && math.IsNaN(r.Practical.V) && !(r.Stability.OK && math.IsNaN(r.Stability.V)) {
					t.Errorf("unit %d point %+v: the practical limit is NaN: %+v", ui, pt, r.Bounds)
				}
			}
		}
	}
}

// EvaluateSample followed by Complete is Evaluate with a hint on the
// weak-grid units with a margin, whose practical limit lies close to
// q_max: the sample path scans below the armature circle instead of
// below q_max and must find the same limit (deferredBounds checks the
// field current at the scan's last point).
func TestSampleCompletesWithMargin(t *testing.T) {
	n := 5000
	if testing.Short() {
		n = 1000
	}
	for ui, u := range hintMarginUnits(t) {
		var hs, he Hint
		deferred := 0
		for i, pt := range walk(n, u.p.PMax, uint64(200+ui)) {
			a := u.EvaluateSample(pt, &hs)
			if a.QMaxPending {
				deferred++
			}
			u.Complete(&a, pt)
			b := u.Evaluate(pt, &he)
			for _, x := range [][2]Bound{{a.QMax, b.QMax}, {a.QMin, b.QMin}, {a.Stability, b.Stability}, {a.Practical, b.Practical}, {a.StabilityTop, b.StabilityTop}} {
				if x[0].OK != x[1].OK || math.Abs(x[0].V-x[1].V) > 1e-8 {
					t.Fatalf("unit %d point %d %+v: sample path %+v, Evaluate %+v", ui, i, pt, x[0], x[1])
				}
			}
			if a.Feasible != b.Feasible || a.Binding != b.Binding || a.QMinLimit != b.QMinLimit {
				t.Fatalf("unit %d point %d %+v: sample path %+v\nEvaluate %+v", ui, i, pt, a, b)
			}
		}
		if u.p.Basis != BasisAVR && deferred == 0 {
			t.Errorf("unit %d: the sample path never deferred q_max", ui)
		}
	}
}
