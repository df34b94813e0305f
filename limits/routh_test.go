package limits

import (
	"math"
	"math/big"
	"math/rand/v2"
	"testing"
)

// routhClassic is Routh's array as Routh wrote it (Routh 1877; any
// control text): each row from the two before by f = r0[0]/r1[0],
// row = r0[j+1] - f r1[j+1]. It is the reference of the fraction-free
// array of routh: the first column col[0..n] (col[k] = Delta_k/Delta_(k-1)
// for k >= 1), the verdict (every entry positive), and sure = false where
// an entry is within 1e-9 of the terms it is formed from (the same rule
// as routh's). With col it goes on past a clearly negative entry.
func routhClassic(c poly, sigma float64, col *[maxSSStates + 1]float64) (stable, sure bool) {
	n := c.n
	var b [maxSSStates + 1]float64 // descending, leading coefficient positive
	sg := 1.0
	if c.c[n] < 0 {
		sg = -1
	}
	for i := 0; i <= n; i++ {
		b[i] = sg * c.c[n-i]
	}
	for i := 0; i < n; i++ { // Taylor shift: b(z) <- b(z + sigma)
		for j := 1; j <= n-i; j++ {
			b[j] += sigma * b[j-1]
		}
	}
	var r0, r1 [maxSSStates/2 + 2]float64
	for i := 0; i <= n; i++ {
		if i%2 == 0 {
			r0[i/2] = b[i]
		} else {
			r1[i/2] = b[i]
		}
	}
	if !(r0[0] > 0) {
		return false, false
	}
	scale := math.Abs(r1[0])
	if col != nil {
		col[0] = r0[0]
	}
	stable = true
	for row := 1; row <= n; row++ {
		if !(r1[0] > 1e-9*scale) {
			sure = math.Abs(r1[0]) > 1e-9*scale
			if col == nil || !sure {
				return false, sure
			}
			stable = false
		}
		if col != nil {
			col[row] = r1[0]
		}
		if row == n {
			break
		}
		f := r0[0] / r1[0]
		var nx [maxSSStates/2 + 2]float64
		for j := 0; j+1 < len(nx); j++ {
			nx[j] = r0[j+1] - f*r1[j+1]
		}
		scale = math.Abs(r0[1]) + math.Abs(f*r1[1])
		r0, r1 = r1, nx
	}
	return stable, true
}

// routhCase is one polynomial of TestRouthFractionFree.
type routhCase struct {
	name  string
	c     poly
	sigma float64
	eps   float64
}

// fromRoots returns the real polynomial with the roots given (each complex
// root with its conjugate), times k.
func fromRoots(k float64, real []float64, pairs []complex128) poly {
	p := pl(k)
	for _, r := range real {
		p = p.mul(pl(-r, 1))
	}
	for _, z := range pairs {
		p = p.mul(pl(real2(z), -2*realPart(z), 1))
	}
	return p
}

func realPart(z complex128) float64 { return real(z) }
func real2(z complex128) float64    { return real(z)*real(z) + imag(z)*imag(z) }

// routhCases are the polynomials the fraction-free array is held to
// Routh's on: random coefficients of every degree up to 8 (log-uniform
// over twelve decades, now and then of either sign, at sigma 0 and at the
// shifts the engine uses), polynomials with roots on and within 1e-12 to
// 1e-3 of the imaginary axis or at 0 (the boundaries), and the model's
// own characteristic polynomials over the chart of the test units.
func routhCases(t *testing.T) []routhCase {
	rng := rand.New(rand.NewPCG(21, 22))
	var cs []routhCase
	sigmas := []float64{0, 0, ssGrowth, -0.3}
	for range 60000 {
		var p poly
		p.n = 1 + rng.IntN(maxSSStates)
		for i := 0; i <= p.n; i++ {
			p.c[i] = math.Pow(10, -6+12*rng.Float64())
			if rng.IntN(20) == 0 {
				p.c[i] = -p.c[i]
			}
		}
		cs = append(cs, routhCase{"random", p, sigmas[rng.IntN(len(sigmas))], 0})
	}
	for range 20000 {
		var re []float64
		var pairs []complex128
		deg := 0
		for deg < 2+rng.IntN(maxSSStates-2) {
			if rng.IntN(3) == 0 {
				re = append(re, -math.Pow(10, -2+4*rng.Float64()))
				deg++
			} else {
				pairs = append(pairs, complex(-math.Pow(10, -2+3*rng.Float64()), math.Pow(10, -1+3*rng.Float64())))
				deg += 2
			}
		}
		if deg > maxSSStates {
			continue
		}
		// Move one root onto, or just either side of, the axis (or to 0).
		eps := []float64{0, 1e-12, -1e-12, 1e-9, -1e-9, 1e-6, -1e-6, 1e-3, -1e-3}[rng.IntN(9)]
		switch {
		case len(pairs) > 0 && rng.IntN(4) != 0:
			pairs[0] = complex(eps, imag(pairs[0]))
		case len(re) > 0:
			re[0] = eps
		default:
			continue
		}
		cs = append(cs, routhCase{"boundary", fromRoots(math.Pow(10, -3+6*rng.Float64()), re, pairs), 0, eps})
	}
	for _, u := range append(append(avrUnits(t), kundurUnit(t, nil)), benchAVR(t), benchAVRIsland(t)) {
		c := &u.avrChar
		for range 2000 {
			p, q, v := 1.2*rng.Float64(), -2.5+3.6*rng.Float64(), 0.8+0.4*rng.Float64()
			k := c.hp.core(p, q, v)
			if k.degener {
				continue
			}
			cs = append(cs, routhCase{"model", c.charPoly(&k), 0, 0}, routhCase{"model", c.charPoly(&k), ssGrowth, 0})
		}
	}
	return cs
}

// routhExact is Routh's array in 512-bit floating point (math/big;
// the float64 coefficients and their products are exact there, and a
// quotient errs by 1e-154): the verdict and Delta_(n-1), a_0 as float64.
// ok is false where an entry comes out zero.
func routhExact(c poly, sigma float64) (stable bool, dn1, a0 float64, ok bool) {
	const prec = 512
	nf := func(x float64) *big.Float { return new(big.Float).SetPrec(prec).SetFloat64(x) }
	n := c.n
	b := make([]*big.Float, n+1)
	sg := 1.0
	if c.c[n] < 0 {
		sg = -1
	}
	for i := 0; i <= n; i++ {
		b[i] = nf(sg * c.c[n-i])
	}
	for i := 0; i < n; i++ {
		for j := 1; j <= n-i; j++ {
			b[j].Add(b[j], nf(sigma).Mul(nf(sigma), b[j-1]))
		}
	}
	w := n/2 + 2
	r0, r1 := make([]*big.Float, w), make([]*big.Float, w)
	for i := range w {
		r0[i], r1[i] = nf(0), nf(0)
	}
	for i := 0; i <= n; i++ {
		if i%2 == 0 {
			r0[i/2].Set(b[i])
		} else {
			r1[i/2].Set(b[i])
		}
	}
	if r0[0].Sign() <= 0 {
		return false, 0, 0, false
	}
	d := nf(1)
	stable = true
	for row := 1; row <= n; row++ {
		if r1[0].Sign() == 0 {
			return false, 0, 0, false
		}
		stable = stable && r1[0].Sign() > 0
		if row == n {
			a0, _ = r1[0].Float64()
			break
		}
		d.Mul(d, r1[0])
		f := nf(0).Quo(r0[0], r1[0])
		nx := make([]*big.Float, w)
		for j := range w {
			nx[j] = nf(0)
			if j+1 < w {
				nx[j].Sub(r0[j+1], nf(0).Mul(f, r1[j+1]))
			}
		}
		r0, r1 = r1, nx
	}
	dn1, _ = d.Float64()
	return stable, dn1, a0, true
}

// The fraction-free Routh array (routh) gives Routh's verdict and the
// margins of the table's build: the references are Routh's array with
// divisions (routhClassic) and the same in 512-bit arithmetic
// (routhExact). On random polynomials and on the model's own, the
// verdict and whether it is sure are Routh's, at every shift. On
// polynomials with a root on the imaginary axis or at 0 (the boundary
// itself: no float64 array can tell the sign there) they may differ, and
// then each is the exact verdict about as often; within 1e-12 of the
// axis and further they agree. Delta_(n-1) is within 1e-6 (relative) of
// the exact value, or no more than 100 times further off than Routh's
// own product of col[1..n-1] (both lose digits where Delta_(n-1) is a
// small difference of large terms; near the boundary Routh's can be off
// by half); on the random and boundary polynomials within 1e-2 will do
// as well (the fraction-free array loses more digits than Routh's on
// some; the margins only steer the band detector, the verdict is their
// signs). a_0 is the exact coefficient.
func TestRouthFractionFree(t *testing.T) {
	counts := map[string]int{}
	for _, tc := range routhCases(t) {
		counts[tc.name]++
		s0, sure0 := routhClassic(tc.c, tc.sigma, nil)
		s1, sure1 := hurwitz(&tc.c, tc.sigma)
		if sure0 != sure1 || sure0 && s0 != s1 {
			if tc.name != "boundary" || tc.eps != 0 {
				t.Errorf("%s %v sigma %g: verdict %v (sure %v), Routh's %v (sure %v)", tc.name, tc.c, tc.sigma, s1, sure1, s0, sure0)
			}
			ex, _, _, exOK := routhExact(tc.c, tc.sigma)
			counts["on the axis: differ"]++
			if exOK && sure1 && s1 == ex {
				counts["on the axis: differ, fraction-free exact"]++
			}
			if exOK && sure0 && s0 == ex {
				counts["on the axis: differ, Routh's exact"]++
			}
		}
		if tc.sigma != 0 {
			continue
		}
		var col [maxSSStates + 1]float64
		s0, sure0 = routhClassic(tc.c, 0, &col)
		s1, sure1, dn1, a0 := routh(&tc.c, 0, true)
		if !sure0 {
			// Routh's array lost an entry: the margins are unknown, and
			// the verdict known only where an entry above it was clearly
			// negative (the verdict alone says which).
			vs, vsure := routhClassic(tc.c, 0, nil)
			if !math.IsNaN(dn1) || !math.IsNaN(a0) || sure1 != vsure || sure1 && s1 != vs {
				if tc.name != "boundary" || tc.eps != 0 {
					t.Errorf("%s %v: margins %g %g, verdict %v (sure %v); Routh's lost an entry (verdict %v, sure %v)", tc.name, tc.c, dn1, a0, s1, sure1, vs, vsure)
				}
			}
			continue
		}
		if !sure1 || s1 != s0 {
			if tc.name != "boundary" || tc.eps != 0 {
				t.Errorf("%s %v: verdict %v (sure %v), Routh's %v", tc.name, tc.c, s1, sure1, s0)
			}
			continue
		}
		if tc.name == "random" && counts[tc.name]%4 != 0 {
			continue // the exact margins on a quarter of them (time)
		}
		_, exD, exA, exOK := routhExact(tc.c, 0)
		if !exOK {
			continue
		}
		d := 1.0
		for i := 1; i < tc.c.n; i++ {
			d *= col[i]
		}
		e0, e1 := math.Abs(d-exD)/math.Abs(exD), math.Abs(dn1-exD)/math.Abs(exD)
		off := e1 > 1e-6 && e1 > 100*e0
		if tc.name != "model" {
			off = off && e1 > 1e-2
		}
		if off || math.Abs(a0-exA) > 1e-15*math.Abs(exA) {
			t.Errorf("%s %v: Delta_(n-1) %g, a_0 %g; exact %g, %g (Routh's array: %g)", tc.name, tc.c, dn1, a0, exD, exA, d)
		}
	}
	t.Logf("%v", counts)
}

// hpConsts.core, the stability tests' reduced form of HeffronPhillips,
// gives HeffronPhillips' constants and E_fd0 (the formulas of the spec
// as HeffronPhillips writes them) to rounding, and the same degenerate
// points.
func TestHPCoreIsHeffronPhillips(t *testing.T) {
	rng := rand.New(rand.NewPCG(23, 24))
	for _, u := range append(append(avrUnits(t), kundurUnit(t, nil)), benchAVR(t), benchAVRIsland(t)) {
		h := u.avrChar.hp
		for range 5000 {
			p, q, v := 1.3*rng.Float64(), -2.5+3.6*rng.Float64(), 0.8+0.4*rng.Float64()
			if rng.IntN(50) == 0 {
				p, q = 0, 0 // no current: E_B = v
			}
			want := u.HeffronPhillips(p, q, v)
			got := h.core(p, q, v)
			if got.degener != want.Degener {
				t.Fatalf("p %v q %v v %v: degenerate %v, want %v", p, q, v, got.degener, want.Degener)
			}
			for i, w := range []float64{want.K1, want.K2, want.K4, want.K5, want.K6, want.Efd} {
				g := []float64{got.k1, got.k2, got.k4, got.k5, got.k6, got.efd}[i]
				if math.Abs(g-w) > 1e-12*(1+math.Abs(w)) {
					t.Errorf("p %v q %v v %v: constant %d %v, want %v", p, q, v, i, g, w)
				}
			}
		}
	}
}
