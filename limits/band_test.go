package limits

import (
	"math"
	"math/rand/v2"
	"testing"
)

// bandUnit is a salient-pole unit with a slow, high-gain exciter and no
// stabilizer, of gain kA (invented parameters of plausible size, not
// check values): at p = 0.35, v = 0.85 pu an unstable band opens below
// q_max between K_A = 115 and about 141, narrowing as K_A grows, with a
// stable island below it.
func bandUnit(t testing.TB, kA float64) *Unit {
	p := benchSalient(t).Params()
	p.Basis, p.MarginFraction = BasisAVR, 0
	p.Xe, p.InertiaHS, p.Td0TransientS, p.DampingPU = 0.78, 7.63, 5.03, 0.84
	p.Exciter = &Exciter{KA: kA, TAS: 0.176, TRS: 0.02}
	return mustNew(t, p)
}

// eigenBand finds, with the eigenvalues alone (gonum's Dgeev, not the
// Routh-Hurwitz criterion the table is built with), the first unstable
// band below q_max at (p, v) by a scan in 0.0005 pu steps down to qLow,
// its edges bisected to 1e-7 pu: unstable on (lo, hi), stable just above
// hi and just below lo. Stable is the table's test: every eigenvalue's
// real part below 0 (the rule's 1e-7 s^-1 allowance moves the edges of a
// band about to close by some 1e-4 pu, the rotor mode's real part then
// changing slowly with q). ok is false when q_max is unstable or no band
// closes above qLow.
func eigenBand(t *testing.T, u *Unit, p, v, qLow float64) (lo, hi float64, ok bool) {
	t.Helper()
	stable := func(q float64) (bool, error) {
		k := u.HeffronPhillips(p, q, v)
		if k.Degener || k.Efd < u.p.Exciter.EfdMin {
			return false, nil
		}
		m := u.stateMatrix(&k)
		ev, err := m.eigenvalues()
		for _, l := range ev {
			if real(l) >= 0 {
				return false, err
			}
		}
		return true, err
	}
	is := func(q float64) bool {
		s, err := stable(q)
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	qTop := math.Sqrt(v*v - p*p)
	if !is(qTop) {
		return 0, 0, false
	}
	const step = 0.0005
	prev, inBand := qTop, false
	for q := qTop - step; q > qLow; q -= step {
		switch s := is(q); {
		case !inBand && !s:
			st, un, _ := bisectStable(stable, prev, q, 1e-7)
			hi, inBand = 0.5*(st+un), true
		case inBand && s:
			st, un, _ := bisectStable(stable, q, prev, 1e-7)
			return 0.5 * (st + un), hi, true
		}
		prev = q
	}
	return 0, 0, false
}

// The table's build finds an unstable band narrower than the 0.04 pu
// scan it replaced: for bands of 0.03, 0.02, 0.01 and 0.005 pu (K_A set
// by bisection so that the eigenvalues show that width at a node of the
// grid, p = 0.35, v = 0.85 pu), the node's q_stability is the band's top
// edge (the topmost stable interval ends there), within the build's
// tolerance (tabTol, 1e-4 pu, and the quantization, 5e-5 pu). The plain
// 0.04 pu scan of the earlier build misses all four there (it logs what
// it finds).
func TestTableFindsNarrowBand(t *testing.T) {
	const p, v = 0.35, 0.85
	ip, iv := int(math.Round(p/tabPStep)), int(math.Round((v-tabVLo)/tabVStep))
	widths := []float64{0.03, 0.02, 0.01, 0.005}
	if testing.Short() {
		widths = widths[1:2]
	}
	for _, w := range widths {
		// The band narrows as K_A grows and is gone by K_A = 145.
		kLo, kHi := 135.0, 145.0
		var lo, hi, kA float64
		for range 60 {
			k := 0.5 * (kLo + kHi)
			l, h, ok := eigenBand(t, bandUnit(t, k), p, v, -0.3)
			if ok && h-l > w {
				kLo = k
			} else {
				kHi = k
			}
			if ok && math.Abs(h-l-w) < 0.1*w {
				lo, hi, kA = l, h, k
				break
			}
		}
		if kA == 0 {
			t.Fatalf("no band %g pu wide for K_A in [135, 145]", w)
		}
		u := bandUnit(t, kA)
		tab := u.avrTab
		got := float64(tab.low[iv*tab.np+ip]) * tabQuant
		// For the record: what the plain 0.04 pu scan of the earlier build
		// finds there.
		qArm := math.Sqrt(v*v - p*p)
		old := topIntervalTo(func(q float64) (bool, error) { return u.avrStableTab(&u.avrChar, p, q, v) },
			qArm, -qArm, -qArm-tabDeep-scanFloor, tabScanStep, tabTol)
		t.Logf("band [%.5f, %.5f], %.4f pu wide (K_A %.4f): table %.5f, plain 0.04 pu scan %.5f", lo, hi, hi-lo, kA, got, old.low.V)
		if math.Abs(got-hi) > tabTol+tabQuant {
			t.Errorf("band [%.5f, %.5f] (%.4f pu wide, K_A %.4f): the table's q_stability at the node is %.5f, want the band's top %.5f",
				lo, hi, hi-lo, u.p.Exciter.KA, got, hi)
		}
	}
}

// With zeta_min > 0 the table's test (avrStableTab: the Routh-Hurwitz
// criterion where a growing root or a margin left of the damping sector
// decides, the eigenvalues elsewhere) gives the rule's verdict by the
// eigenvalues (avrStable) at random points, except within 1e-4 pu of a
// boundary.
func TestZetaMinTabIsEigenRule(t *testing.T) {
	rng := rand.New(rand.NewPCG(21, 22))
	n := 4000
	if testing.Short() {
		n = 500
	}
	for _, u := range avrUnits(t) {
		p := u.Params()
		for _, zeta := range []float64{0.03, 0.1} {
			p.ZetaMin = zeta
			uz := mustNew(t, p)
			bad := 0
			for range n {
				pp, q, v := 1.1*rng.Float64(), -1.2+2.2*rng.Float64(), 0.85+0.3*rng.Float64()
				got, err1 := uz.avrStableTab(&uz.avrChar, pp, q, v)
				want, err2 := uz.avrStable(pp, q, v)
				if err1 != nil || err2 != nil || got == want {
					continue
				}
				lo, _ := uz.avrStable(pp, q-1e-4, v)
				hi, _ := uz.avrStable(pp, q+1e-4, v)
				if lo == hi {
					bad++
					if bad <= 3 {
						t.Errorf("zeta_min %v at p %.4f q %.4f v %.4f: table test %v, eigenvalues %v", zeta, pp, q, v, got, want)
					}
				}
			}
		}
	}
}
