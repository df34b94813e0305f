package limits

import (
	"math"
)

// The stability limit on the avr basis: the topmost-stable-interval rule
// (envelope.md, "Which stable interval, and the limit") over the
// small-signal test of smallsignal.go, computed directly (a Routh-Hurwitz
// scan confirmed by eigenvalues), and a per-unit table of it for the
// per-sample path.

// interval is the outcome of the topmost-stable-interval rule at one p
// and v.
type interval struct {
	top Bound // when q_max itself is unstable: the top of the topmost stable interval below it
	low Bound // q_stability, the bottom of that interval; absent when no stable q exists
	err error // the stability test failed (ErrSmallSignal); low and top are then absent
}

// Scan parameters of the rule: the step of the downward scan (pu, the
// spec's), the bisection tolerance of the direct computation (pu, the
// spec's) and how far below the armature lower bound the scan looks for
// the bottom of the interval (pu, our choice: the limit is then reported
// at that depth, which only the stability margin's value shows, since
// the armature binds there).
const (
	scanStep  = 0.02
	scanTol   = 1e-6
	scanFloor = 1.0
)

// topInterval applies the rule to stable along q in [qBot, qTop]: scan
// downward from qTop in steps of step; the first stable q (refined by
// bisection against the unstable one above it when qTop is unstable) is
// the top of the topmost stable interval; continue downward to the first
// unstable q and bisect to tol between it and the last stable one: that
// is q_stability (the midpoint of the final bracket). No stable q down to
// qBot: low is absent (infeasible, reason stability). Stable down to
// qBot - scanFloor: low is reported there.
func topInterval(stable func(q float64) (bool, error), qTop, qBot, step, tol float64) interval {
	return topIntervalTo(stable, qTop, qBot, qBot-scanFloor, step, tol)
}

// topIntervalTo is topInterval with the floor of the downward scan for
// the interval's bottom given (the table's build looks deeper than the
// direct scan, tabDeep; the top is looked for down to qBot on both).
func topIntervalTo(stable func(q float64) (bool, error), qTop, qBot, floor, step, tol float64) interval {
	var iv interval
	s, err := stable(qTop)
	if err != nil {
		return interval{err: err}
	}
	q := qTop
	if !s {
		found := false
		for q > qBot {
			hi := q
			q = max(q-step, qBot)
			if s, err = stable(q); err != nil {
				return interval{err: err}
			}
			if s {
				lo := q
				if lo, _, err = bisectStable(stable, lo, hi, tol); err != nil {
					return interval{err: err}
				}
				q, found = lo, true
				iv.top = some(lo)
				break
			}
		}
		if !found {
			return iv
		}
	}
	for {
		if q <= floor {
			iv.low = some(floor)
			return iv
		}
		hi := q
		q = max(q-step, floor)
		if s, err = stable(q); err != nil {
			return interval{err: err}
		}
		if !s {
			st, un, err := bisectStable(stable, hi, q, tol)
			if err != nil {
				return interval{err: err}
			}
			iv.low = some(0.5 * (st + un))
			return iv
		}
	}
}

// bisectStable narrows [a, b] between a stable q (st) and an unstable
// one (un), in either order, to tol; it returns the final pair.
func bisectStable(stable func(float64) (bool, error), st, un, tol float64) (float64, float64, error) {
	for math.Abs(st-un) > tol {
		m := 0.5 * (st + un)
		s, err := stable(m)
		if err != nil {
			return 0, 0, err
		}
		if s {
			st = m
		} else {
			un = m
		}
	}
	return st, un, nil
}

// avrInterval is the direct computation of the rule on the avr basis at
// p, v below qTop, down to the armature lower bound qBot. The scan and
// the bisection run on the Routh-Hurwitz test of the characteristic
// polynomial (the same verdict as the eigenvalues, some hundred ns
// against tens of microseconds, TestRouthAgreesWithEigenvalues), and the
// eigenvalues (gonum mat.Eigen) confirm the answer: stable just above
// q_stability and unstable just below it (scanTol either side of the
// bisection's midpoint), the same about a moved top. Where they do not
// confirm it, where no stable q is found, and always with zeta_min > 0
// (a damping-ratio rule, which the criterion does not decide), the rule
// runs on the eigenvalues at every test.
func (u *Unit) avrInterval(p, v, qTop, qBot float64) interval {
	eig := func(q float64) (bool, error) { return u.avrStable(p, q, v) }
	if u.p.ZetaMin == 0 {
		c := &u.avrChar
		iv := topInterval(func(q float64) (bool, error) { return u.avrStableFast(c, p, q, v, ssGrowth) }, qTop, qBot, scanStep, scanTol)
		if iv.err == nil && iv.low.OK && confirm(eig, iv, qTop, qBot) {
			return iv
		}
	}
	return topInterval(eig, qTop, qBot, scanStep, scanTol)
}

// confirm checks iv, found by the Routh-Hurwitz test, with the
// eigenvalues: stable scanTol above q_stability (or at it, when the scan
// reached its floor) and unstable scanTol below; a moved top stable
// scanTol below it and unstable scanTol above (or at qTop).
func confirm(stable func(float64) (bool, error), iv interval, qTop, qBot float64) bool {
	is := func(q float64, want bool) bool {
		s, err := stable(q)
		return err == nil && s == want
	}
	if iv.low.V <= qBot-scanFloor {
		if !is(iv.low.V, true) {
			return false
		}
	} else if !is(iv.low.V+scanTol, true) || !is(iv.low.V-scanTol, false) {
		return false
	}
	if iv.top.OK {
		return is(iv.top.V-scanTol, true) && is(min(iv.top.V+scanTol, qTop), false)
	}
	return is(qTop, true)
}

// poly is a polynomial in s, ascending coefficients c[0] + c[1] s + ...,
// of degree n (at most maxSSStates).
type poly struct {
	c [maxSSStates + 1]float64
	n int
}

func pl(c ...float64) poly {
	var p poly
	copy(p.c[:], c)
	p.n = len(c) - 1
	return p
}

func (a poly) mul(b poly) poly {
	var r poly
	r.n = a.n + b.n
	for i := 0; i <= a.n; i++ {
		for j := 0; j <= b.n; j++ {
			r.c[i+j] += a.c[i] * b.c[j]
		}
	}
	return r
}

// charParts are the q-independent pieces of the characteristic
// polynomial (see charPoly), formed once per unit.
type charParts struct {
	m0c1, m0c2, c1, c2, c3, c5 poly
	n                          int // the highest degree among them
	hp                         hpConsts
}

// charPoly returns the characteristic polynomial of the state matrix of
// stateMatrix, up to a positive factor, from the model's transfer
// functions (block-diagram reduction of the same equations):
//
//	M = (2H/w_s) s^2 + (D/w_s) s + K1, F = 1 + s T'd0 K3,
//	A = 1 + s T_A, R = 1 + s T_R, Dp = (1 + s T_w)(1 + s T2)(1 + s T4),
//	Np = (k T_w/w_s) s^2 (1 + s T1)(1 + s T3) (Dp = 1, Np = 0 without a stabilizer)
//	PE = Dp (F A R + K3 K_A K6), QE = K3 K_A (R Np - K5 Dp) - K3 K4 A R Dp
//	char(s) = M PE + K2 QE
//
// from 2H s dw = -K1 dd - K2 dE'q - D dw, dw = s dd/w_s,
// F dE'q = K3 (dEfd - K4 dd), A R Dp dEfd = K_A (R Np dd - Dp (K5 dd + K6 dE'q)).
// K3 depends only on the reactances, so with M = m0 + K1 the polynomial
// is a sum of seven fixed polynomials weighted by the constants:
//
//	char = m0 c1 + K6 m0 c2 + K1 c1 + K1 K6 c2 + K2 c3 - K2 K5 c4 - K2 K4 c5
//	c1 = F A R Dp, c2 = c4 = K3 K_A Dp, c3 = K3 K_A R Np, c5 = K3 A R Dp.
func (u *Unit) charParts() charParts {
	ex, ps := u.p.Exciter, u.p.Stabilizer
	ws := 2 * math.Pi * u.p.FrequencyHz
	k3 := (u.p.XdTransient + u.p.Xe) / (u.p.Xd + u.p.Xe)
	m0 := pl(0, u.p.DampingPU/ws, 2*u.p.InertiaHS/ws)
	f := pl(1, u.p.Td0TransientS*k3)
	a := pl(1, ex.TAS)
	r := pl(1)
	if ex.transducer() {
		r = pl(1, ex.TRS)
	}
	dp, np := pl(1), pl(0)
	if ps != nil {
		dp = pl(1, ps.TWS).mul(pl(1, ps.T2S)).mul(pl(1, ps.T4S))
		np = pl(0, 0, ps.K*ps.TWS/ws).mul(pl(1, ps.T1S)).mul(pl(1, ps.T3S))
	}
	ard := a.mul(r).mul(dp)
	var c charParts
	c.c1 = f.mul(ard)
	c.c2 = pl(k3 * ex.KA).mul(dp)
	c.c3 = pl(k3 * ex.KA).mul(r).mul(np)
	c.c5 = pl(k3).mul(ard)
	c.m0c1, c.m0c2 = m0.mul(c.c1), m0.mul(c.c2)
	for _, q := range [...]*poly{&c.m0c1, &c.m0c2, &c.c1, &c.c2, &c.c3, &c.c5} {
		c.n = max(c.n, q.n)
	}
	c.hp = u.hpConsts()
	return c
}

// charPoly returns the characteristic polynomial at the constants k (see
// charParts; c2 = c4, so K1 K6 c2 - K2 K5 c4 is one term).
func (c *charParts) charPoly(k *hpCore) (r poly) {
	w0, w1, w2, w3, w5 := k.k6, k.k1, k.k1*k.k6-k.k2*k.k5, k.k2, -k.k2*k.k4
	r.n = c.n
	// Every coefficient up to the degree, those beyond a part's degree
	// being zero: the same sums as part by part, without the loops'
	// control (the rest stay zero, as the sums of zeros were).
	for i := range r.c[:min(r.n, maxSSStates)+1] {
		r.c[i] = c.m0c1.c[i] + w0*c.m0c2.c[i] + w1*c.c1.c[i] + w2*c.c2.c[i] + w3*c.c3.c[i] + w5*c.c5.c[i]
	}
	return r
}

// hurwitz says whether every root of c has a real part below sigma,
// by the Routh-Hurwitz criterion on c(z + sigma) (Routh 1877; any control
// text). sure is false when an entry of the first column is lost to
// cancellation (within 1e-9 of the terms it is formed from), where the
// verdict is not to be trusted.
func hurwitz(c *poly, sigma float64) (stable, sure bool) {
	stable, sure, _, _ = routh(c, sigma, false)
	return stable, sure
}

// routh is hurwitz. With margins it goes on past a clearly negative
// entry of the first column to the end and also returns the Hurwitz
// determinant Delta_(n-1) and a_0 (both up to the sign that makes the
// leading coefficient positive); they are NaN where an entry is lost to
// cancellation, and sure then says whether the verdict is known all the
// same (an earlier entry was clearly negative: unstable).
//
// The array is the fraction-free (Bareiss) form of Routh's: row k is
// Delta_(k-1) times Routh's row k, so that its first entry is the Hurwitz
// determinant Delta_k (Delta_0 = 1; Routh's first column is a_n, Delta_1,
// Delta_2/Delta_1, ..., Delta_n/Delta_(n-1), with Delta_n = a_0
// Delta_(n-1): Gantmacher, The Theory of Matrices, vol. 2, ch. XV, from
// memory). Row k+1 = (R_k[0] R_(k-1)[j+1] - R_(k-1)[0] R_k[j+1])/Delta_(k-2)
// (the divisor 1 for rows 2 and 3), an exact division: the divisor is
// known three rows ahead, so no division waits on the row before (the
// rows are a chain, and a division costs several multiplications). Each
// entry of the first column is checked as Routh's is: its sign, and
// whether it exceeds 1e-9 of the two products it is the difference of
// (Routh's entry and terms times the same factor Delta_k/Delta_(k-2)).
// TestRouthFractionFree holds the verdicts and margins to Routh's own
// array (written in the test) on random and on the model's polynomials.
func routh(c *poly, sigma float64, margins bool) (stable, sure bool, dn1, a0 float64) {
	n := c.n
	if n < 1 || n > maxSSStates {
		return false, false, math.NaN(), math.NaN()
	}
	if k := &c.c; sigma == 0 && k[n] > 0 {
		// The model's polynomials (the leading coefficient positive):
		// the first two rows straight from the coefficients.
		switch n {
		case 8:
			stable, sure, dn1 = routh8(k[8], k[6], k[4], k[2], k[0], k[7], k[5], k[3], k[1], 0, margins)
			return routhEnd(stable, sure, dn1, k[0], margins)
		case 7:
			stable, sure, dn1 = routh7(k[7], k[5], k[3], k[1], 0, k[6], k[4], k[2], k[0], 0, margins)
			return routhEnd(stable, sure, dn1, k[0], margins)
		case 5:
			stable, sure, dn1 = routh5(k[5], k[3], k[1], 0, 0, k[4], k[2], k[0], 0, 0, margins)
			return routhEnd(stable, sure, dn1, k[0], margins)
		case 4:
			stable, sure, dn1 = routh4(k[4], k[2], k[0], 0, 0, k[3], k[1], 0, 0, 0, margins)
			return routhEnd(stable, sure, dn1, k[0], margins)
		}
	}
	// The first two rows are the coefficients, descending, alternately,
	// with the sign that makes the leading one positive: e holds a_k at
	// e[9+k] and zeros below, so that row 0 is e[9+n], e[7+n], ... and
	// row 1 e[8+n], e[6+n], ... (straight-line loads, no loop).
	var e [2*maxSSStates + 2]float64
	sg := 1.0
	if c.c[n] < 0 {
		sg = -1
	}
	if sigma == 0 {
		*(*[maxSSStates + 1]float64)(e[maxSSStates+1:]) = c.c
	} else {
		var b [maxSSStates + 1]float64 // descending
		for i := 0; i <= n; i++ {
			b[i] = c.c[n-i]
		}
		// Taylor shift: b(z) <- b(z + sigma).
		for i := 0; i < n; i++ {
			for j := 1; j <= n-i; j++ {
				b[j] += sigma * b[j-1]
			}
		}
		for i := 0; i <= n; i++ {
			e[maxSSStates+1+n-i] = b[i]
		}
	}
	w := e[n : n+maxSSStates+2]
	// The rows before, R_(k-1) = x and R_k = y, in registers: five
	// entries hold every row of a polynomial of degree 8 or less (row 0
	// is the longest).
	x0, x1, x2, x3, x4 := sg*w[9], sg*w[7], sg*w[5], sg*w[3], sg*w[1]
	y0, y1, y2, y3, y4 := sg*w[8], sg*w[6], sg*w[4], sg*w[2], sg*w[0]
	if !(x0 > 0) {
		return false, false, math.NaN(), math.NaN()
	}
	a0 = sg * w[9-n]
	switch n {
	case 8:
		stable, sure, dn1 = routh8(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4, margins)
	case 7:
		stable, sure, dn1 = routh7(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4, margins)
	case 5:
		stable, sure, dn1 = routh5(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4, margins)
	case 4:
		stable, sure, dn1 = routh4(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4, margins)
	default:
		stable, sure, dn1 = routhRows(n, x0, x1, x2, x3, x4, y0, y1, y2, y3, y4, margins)
	}
	return routhEnd(stable, sure, dn1, a0, margins)
}

// routhEnd is routh's answer from that of the rows (routhRows).
func routhEnd(stable, sure bool, dn1, a0 float64, margins bool) (bool, bool, float64, float64) {
	if math.IsNaN(dn1) { // an entry not positive (the verdict) or lost (margins)
		return false, sure, dn1, dn1
	}
	if !margins {
		return true, true, 0, 0
	}
	return stable, true, dn1, a0
}

// routhRows forms the rows of routh's array after the first two, x and
// y, for a polynomial of degree n: the verdict, whether it is sure, and
// Delta_(n-1) (NaN where an entry ends the array early: not positive
// without margins, lost to cancellation with them). routh4, routh5,
// routh7 and routh8 are the same for the degrees of the model (4 and 5
// without a stabilizer, 7 and 8 with one), unrolled with each row only as
// long as it is: the same arithmetic on the entries that exist.
func routhRows(n int, x0, x1, x2, x3, x4, y0, y1, y2, y3, y4 float64, margins bool) (stable, sure bool, dn1 float64) {
	dn1 = 1
	i0, i1, i2 := 1.0, 1.0, 1/y0
	// The check of row 1 (a_(n-1) > 0) as Routh's: its terms are itself.
	hi := math.Abs(y0)
	stable = true
	// Three rows a turn, the registers taking turns as the rows x, y and
	// z (no copying from one to the next). A row's entries beyond its end
	// come out zero from the zeros beyond the ends of the rows before
	// (straight-line code: the loop's control cost more than its
	// arithmetic); the fifth entry is zero from row 2 on. Row row+1 is
	// formed with the older row scaled by the divisor first, off the chain
	// from the newer one.
	var z0, z1, z2, z3, z4, b, t, u float64
	for row := 1; ; {
		if !(y0 > 1e-9*hi) {
			sure = math.Abs(y0) > 1e-9*hi
			if !margins || !sure {
				return false, !stable || sure && !margins, math.NaN()
			}
			stable = false // clearly negative: on to the rest of the column
		}
		if row == n-1 {
			dn1 = y0
		}
		if row == n {
			break
		}
		row++
		b = x0 * i0
		t, u = y0*(x1*i0), b*y1
		z0, z1, z2, z3 = t-u, y0*(x2*i0)-b*y2, y0*(x3*i0)-b*y3, y0*(x4*i0)-b*y4
		hi = math.Abs(t) + math.Abs(u)
		i0, i1, i2 = i1, i2, 1/z0
		z4 = 0
		if !(z0 > 1e-9*hi) {
			sure = math.Abs(z0) > 1e-9*hi
			if !margins || !sure {
				return false, !stable || sure && !margins, math.NaN()
			}
			stable = false // clearly negative: on to the rest of the column
		}
		if row == n-1 {
			dn1 = z0
		}
		if row == n {
			break
		}
		row++
		b = y0 * i0
		t, u = z0*(y1*i0), b*z1
		x0, x1, x2, x3 = t-u, z0*(y2*i0)-b*z2, z0*(y3*i0)-b*z3, z0*(y4*i0)-b*z4
		hi = math.Abs(t) + math.Abs(u)
		i0, i1, i2 = i1, i2, 1/x0
		x4 = 0
		if !(x0 > 1e-9*hi) {
			sure = math.Abs(x0) > 1e-9*hi
			if !margins || !sure {
				return false, !stable || sure && !margins, math.NaN()
			}
			stable = false // clearly negative: on to the rest of the column
		}
		if row == n-1 {
			dn1 = x0
		}
		if row == n {
			break
		}
		row++
		b = z0 * i0
		t, u = x0*(z1*i0), b*x1
		y0, y1, y2, y3 = t-u, x0*(z2*i0)-b*x2, x0*(z3*i0)-b*x3, x0*(z4*i0)-b*x4
		hi = math.Abs(t) + math.Abs(u)
		i0, i1, i2 = i1, i2, 1/y0
		y4 = 0
	}
	return stable, true, dn1
}

// routh4 is routhRows for a polynomial of degree 4, unrolled.
func routh4(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4 float64, margins bool) (stable, sure bool, dn1 float64) {
	hi := math.Abs(y0)
	stable = true
	var t, u float64
	if !(y0 > 1e-9*hi) {
		if sure = math.Abs(y0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i1 := 1 / y0
	b1 := x0
	t, u = y0*x1, b1*y1
	r2_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r2_1 := y0 * x2
	if !(r2_0 > 1e-9*hi) {
		if sure = math.Abs(r2_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	b2 := y0
	t, u = r2_0*y1, b2*r2_1
	r3_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r3_0 > 1e-9*hi) {
		if sure = math.Abs(r3_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	dn1 = r3_0
	t, u = r3_0*(r2_1*i1), 0
	r4_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r4_0 > 1e-9*hi) {
		if sure = math.Abs(r4_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	return stable, true, dn1
}

// routh5 is routhRows for a polynomial of degree 5, unrolled.
func routh5(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4 float64, margins bool) (stable, sure bool, dn1 float64) {
	hi := math.Abs(y0)
	stable = true
	var t, u float64
	if !(y0 > 1e-9*hi) {
		if sure = math.Abs(y0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i1 := 1 / y0
	b1 := x0
	t, u = y0*x1, b1*y1
	r2_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r2_1 := y0*x2 - b1*y2
	if !(r2_0 > 1e-9*hi) {
		if sure = math.Abs(r2_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i2 := 1 / r2_0
	b2 := y0
	t, u = r2_0*y1, b2*r2_1
	r3_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r3_1 := r2_0 * y2
	if !(r3_0 > 1e-9*hi) {
		if sure = math.Abs(r3_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	b3 := r2_0 * i1
	t, u = r3_0*(r2_1*i1), b3*r3_1
	r4_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r4_0 > 1e-9*hi) {
		if sure = math.Abs(r4_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	dn1 = r4_0
	t, u = r4_0*(r3_1*i2), 0
	r5_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r5_0 > 1e-9*hi) {
		if sure = math.Abs(r5_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	return stable, true, dn1
}

// routh7 is routhRows for a polynomial of degree 7, unrolled.
func routh7(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4 float64, margins bool) (stable, sure bool, dn1 float64) {
	hi := math.Abs(y0)
	stable = true
	var t, u float64
	if !(y0 > 1e-9*hi) {
		if sure = math.Abs(y0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i1 := 1 / y0
	b1 := x0
	t, u = y0*x1, b1*y1
	r2_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r2_1 := y0*x2 - b1*y2
	r2_2 := y0*x3 - b1*y3
	if !(r2_0 > 1e-9*hi) {
		if sure = math.Abs(r2_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i2 := 1 / r2_0
	b2 := y0
	t, u = r2_0*y1, b2*r2_1
	r3_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r3_1 := r2_0*y2 - b2*r2_2
	r3_2 := r2_0 * y3
	if !(r3_0 > 1e-9*hi) {
		if sure = math.Abs(r3_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i3 := 1 / r3_0
	b3 := r2_0 * i1
	t, u = r3_0*(r2_1*i1), b3*r3_1
	r4_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r4_1 := r3_0*(r2_2*i1) - b3*r3_2
	if !(r4_0 > 1e-9*hi) {
		if sure = math.Abs(r4_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i4 := 1 / r4_0
	b4 := r3_0 * i2
	t, u = r4_0*(r3_1*i2), b4*r4_1
	r5_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r5_1 := r4_0 * (r3_2 * i2)
	if !(r5_0 > 1e-9*hi) {
		if sure = math.Abs(r5_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	b5 := r4_0 * i3
	t, u = r5_0*(r4_1*i3), b5*r5_1
	r6_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r6_0 > 1e-9*hi) {
		if sure = math.Abs(r6_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	dn1 = r6_0
	t, u = r6_0*(r5_1*i4), 0
	r7_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r7_0 > 1e-9*hi) {
		if sure = math.Abs(r7_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	return stable, true, dn1
}

// routh8 is routhRows for a polynomial of degree 8, unrolled.
func routh8(x0, x1, x2, x3, x4, y0, y1, y2, y3, y4 float64, margins bool) (stable, sure bool, dn1 float64) {
	hi := math.Abs(y0)
	stable = true
	var t, u float64
	if !(y0 > 1e-9*hi) {
		if sure = math.Abs(y0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i1 := 1 / y0
	b1 := x0
	t, u = y0*x1, b1*y1
	r2_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r2_1 := y0*x2 - b1*y2
	r2_2 := y0*x3 - b1*y3
	r2_3 := y0 * x4
	if !(r2_0 > 1e-9*hi) {
		if sure = math.Abs(r2_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i2 := 1 / r2_0
	b2 := y0
	t, u = r2_0*y1, b2*r2_1
	r3_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r3_1 := r2_0*y2 - b2*r2_2
	r3_2 := r2_0*y3 - b2*r2_3
	if !(r3_0 > 1e-9*hi) {
		if sure = math.Abs(r3_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i3 := 1 / r3_0
	b3 := r2_0 * i1
	t, u = r3_0*(r2_1*i1), b3*r3_1
	r4_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r4_1 := r3_0*(r2_2*i1) - b3*r3_2
	r4_2 := r3_0 * (r2_3 * i1)
	if !(r4_0 > 1e-9*hi) {
		if sure = math.Abs(r4_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i4 := 1 / r4_0
	b4 := r3_0 * i2
	t, u = r4_0*(r3_1*i2), b4*r4_1
	r5_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r5_1 := r4_0*(r3_2*i2) - b4*r4_2
	if !(r5_0 > 1e-9*hi) {
		if sure = math.Abs(r5_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	i5 := 1 / r5_0
	b5 := r4_0 * i3
	t, u = r5_0*(r4_1*i3), b5*r5_1
	r6_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	r6_1 := r5_0 * (r4_2 * i3)
	if !(r6_0 > 1e-9*hi) {
		if sure = math.Abs(r6_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	b6 := r5_0 * i4
	t, u = r6_0*(r5_1*i4), b6*r6_1
	r7_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r7_0 > 1e-9*hi) {
		if sure = math.Abs(r7_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	dn1 = r7_0
	t, u = r7_0*(r6_1*i5), 0
	r8_0 := t - u
	hi = math.Abs(t) + math.Abs(u)
	if !(r8_0 > 1e-9*hi) {
		if sure = math.Abs(r8_0) > 1e-9*hi; !margins || !sure {
			return false, !stable || sure && !margins, math.NaN()
		}
		stable = false // clearly negative: on to the rest of the column
	}
	return stable, true, dn1
}

// avrStableFast is avrStable by the Routh-Hurwitz criterion on the
// characteristic polynomial instead of eigenvalues: some hundred
// nanoseconds against some microseconds. It applies the growth rule
// (every root below 1e-7 s^-1), which with zeta_min = 0 is the whole
// rule (see modeUnstable); with zeta_min > 0, or where the criterion is
// not sure, it takes the eigenvalues.
//
// With sigma = 0 the criterion tests Re < 0 rather than Re <= 1e-7 s^-1,
// which the per-sample checks use (they look 0.0019 pu away from the
// boundary, where the difference does not show).
func (u *Unit) avrStableFast(c *charParts, p, q, v, sigma float64) (bool, error) {
	k := c.hp.core(p, q, v)
	if k.degener || k.efd < u.p.Exciter.EfdMin {
		return false, nil
	}
	if u.p.ZetaMin == 0 {
		cp := c.charPoly(&k)
		if s, sure := hurwitz(&cp, sigma); sure {
			return s, nil
		}
	}
	return u.avrStable(p, q, v)
}

// avrStableTab is the test of the table's build: the Routh-Hurwitz
// criterion without the shift first (Re < 0), and with it (Re <= 1e-7
// s^-1) only where the first is not sure, as at an undamped mode. The two
// differ only for a mode with 0 <= Re <= 1e-7 s^-1, within some 1e-6 pu
// of a boundary, far inside the table's tolerance. With zeta_min > 0 the
// criterion decides where it can (see below), the eigenvalues elsewhere.
func (u *Unit) avrStableTab(c *charParts, p, q, v float64) (bool, error) {
	k := c.hp.core(p, q, v)
	if k.degener || k.efd < u.p.Exciter.EfdMin {
		return false, nil
	}
	if u.p.ZetaMin == 0 {
		cp := c.charPoly(&k)
		if s, sure := hurwitz(&cp, 0); sure {
			return s, nil
		}
		if s, sure := hurwitz(&cp, ssGrowth); sure {
			return s, nil
		}
	} else if z := u.p.ZetaMin; z < 1 {
		// The damping rule by the Routh-Hurwitz criterion where it
		// decides: a root growing (Re > 1e-7 s^-1) is unstable under it
		// too, and with every root left of -sigma, sigma = zeta_min W /
		// sqrt(1 - zeta_min^2) (W the top of the electromechanical band),
		// every mode of the band has a damping ratio above zeta_min
		// (-Re/|lambda| >= sigma/sqrt(sigma^2 + W^2) = zeta_min) and none
		// grows. Between the two, the eigenvalues.
		cp := c.charPoly(&k)
		if s, sure := hurwitz(&cp, ssGrowth); sure && !s {
			return false, nil
		}
		if s, sure := hurwitz(&cp, -z*emBandHi/math.Sqrt(1-z*z)); sure && s {
			return true, nil
		}
	}
	return u.avrStable(p, q, v)
}

// stabTable is q_stability on the avr basis over a grid of p and v,
// built once in New, for the per-sample path: the rule is applied at
// every node with the Routh-Hurwitz test, the band detector of
// tabScanDown and regula falsi to tabTol (tabInterval), and read by
// bilinear interpolation; see fastInterval for how its answer is
// used and checked. Cells where the stable set is not one interval
// (markScan) are not read: the per-sample path applies the rule there.
type stabTable struct {
	np, nv   int
	pStep    float64 // pu; the p grid starts at 0
	v0, vInv float64 // first v node, 1/step
	low      []int16 // q_stability at node (i_v*np + i_p), in steps of tabQuant; tabNone: no stable q
	top      []int16 // top of the topmost stable interval (the armature circle where that is stable); nil when no node moved
	moved    []bool  // top lies below the armature circle (q_max moves there); nil when no node moved
	smooth   []bool  // cell (i_v*(np-1) + i_p) interpolates within tabSmooth, by its second differences
	scan     []bool  // cell (i_v*(np-1) + i_p) has a node with a stable island below q_stability: the per-sample path scans there
}

// hasIsland says whether stable finds a stable q below the limit low
// (an unstable band between two stable intervals), scanning down from
// low to floor in steps of tabIslandStep. Where a node has one, a band can
// open or close inside the cells about it, moving the topmost interval's
// bottom by far more than interpolation or the bracket check can tell
// (high-gain, slow exciters), so those cells are not read from the
// table. A failed test counts as an island (the cell is scanned).
func hasIsland(stable func(float64) (bool, error), low, floor float64) bool {
	for q := low - tabIslandStep; q > floor; q -= tabIslandStep {
		if s, err := stable(q); err != nil || s {
			return true
		}
	}
	return false
}

// markScan marks the cells the per-sample path does not read: those
// with a node that has a stable island, and those where the rule applied
// at the cell's centre (at) shows what the four nodes do not: an island,
// a different answer on feasibility or on whether the top moves, or a
// limit or top more than tabNear from the nodes' mean (an unstable band
// that opens or a stable island that rises inside the cell, which the
// bracket check cannot tell from the boundary below it). A centre more
// than tabSmooth from that mean makes the cell not smooth.
func (t *stabTable) markScan(island []bool, low, top []float64, moved []bool, at func(p, v float64) (interval, bool)) error {
	t.scan = make([]bool, (t.np-1)*(t.nv-1))
	for iv := range t.nv - 1 {
		for ip := range t.np - 1 {
			k, cell := iv*t.np+ip, iv*(t.np-1)+ip
			idx := [4]int{k, k + 1, k + t.np, k + t.np + 1}
			if island[idx[0]] || island[idx[1]] || island[idx[2]] || island[idx[3]] {
				t.scan[cell] = true
				continue
			}
			it, isl := at((float64(ip)+0.5)*t.pStep, t.v0+(float64(iv)+0.5)/t.vInv)
			if it.err != nil {
				return it.err
			}
			var mLow, mTop float64
			anyMoved, allOK := false, true
			for _, j := range idx {
				mLow += low[j] / 4
				mTop += top[j] / 4
				anyMoved = anyMoved || moved[j]
				allOK = allOK && !math.IsNaN(low[j])
			}
			switch {
			case isl || it.low.OK != allOK || it.top.OK != anyMoved:
				t.scan[cell] = true
			case !it.low.OK:
			default:
				d := math.Abs(it.low.V - mLow)
				if it.top.OK {
					d = max(d, math.Abs(it.top.V-mTop))
				}
				t.scan[cell] = d > tabNear
				t.smooth[cell] = t.smooth[cell] && d <= tabSmooth
			}
		}
	}
	return nil
}

// The table stores q in fixed point: tabQuant pu a step (an error of
// 5e-5 pu at most, inside the margin of tabSmooth), tabNone for "no
// stable operation". Two bytes a node keep a 10,000-unit fleet's tables
// to about 12 MB with the polynomial parts.
const (
	tabQuant = 1e-4
	tabNone  = math.MinInt16
)

func toQ16(q float64) int16 {
	return int16(math.Round(max(-3.2, min(3.2, q)) / tabQuant))
}

// The grid of stabTable: p from 0 to tabPMax, v from tabVLo to tabVHi.
// Its spacing keeps bilinear interpolation within 0.002 pu of the direct
// computation over the chart (TestAVRTableAgrees). The plain scan's step
// tabScanStep (twice the direct scan's, our choice; where q_max is
// unstable and with zeta_min > 0) sees the unstable bands of high-gain
// slow exciters that a 0.2 pu step missed (a band 0.05-0.3 pu wide
// between q_max and the limit, TestRandomUnitsFastAnswer); elsewhere the
// band detector (tabScanDown) finds narrower ones still. The islands
// below the limit are looked for at tabIslandStep.
const (
	tabPMax       = 1.2
	tabPStep      = 0.05
	tabVLo        = 0.85
	tabVHi        = 1.15
	tabVStep      = 0.05
	tabScanStep   = 0.04
	tabIslandStep = 0.1
	tabTol        = 1e-4
)

// tabCheck is the half-width of the bracket, pu, in which the per-sample
// path checks the table's answer (see fastInterval): it keeps the fast
// answer within 0.002 pu of the direct computation.
const tabCheck = 0.0019

// buildStabTable applies the rule at every node of the grid, below the
// armature circle at rated current (q_max without the field limit).
func (u *Unit) buildStabTable() (*stabTable, error) {
	t := &stabTable{np: int(math.Round(tabPMax/tabPStep)) + 1, nv: int(math.Round((tabVHi-tabVLo)/tabVStep)) + 1,
		pStep: tabPStep, v0: tabVLo, vInv: 1 / tabVStep}
	n := t.np * t.nv
	low, top, moved, island := make([]float64, n), make([]float64, n), make([]bool, n), make([]bool, n)
	c := &u.avrChar
	scratch := tabScratch{seen: make([]tabSample, 0, 128)}
	for iv := range t.nv {
		v := tabVLo + float64(iv)*tabVStep
		for ip := range t.np {
			p := float64(ip) * tabPStep
			qArm := math.Sqrt(max(v*v-p*p, 0))
			stable := func(q float64) (bool, error) { return u.avrStableTab(c, p, q, v) }
			k := iv*t.np + ip
			it := u.tabInterval(c, &scratch, p, v, qArm, -qArm, -qArm-tabDeep-scanFloor)
			if it.err != nil {
				return nil, it.err
			}
			low[k], top[k] = math.NaN(), qArm
			if it.low.OK {
				low[k] = it.low.V
				island[k] = hasIsland(stable, it.low.V, -qArm-tabDeep-scanFloor)
			}
			if it.top.OK {
				top[k], moved[k] = it.top.V, true
			}
		}
	}
	t.markSmooth(low, top, moved)
	if err := t.markScan(island, low, top, moved, func(p, v float64) (interval, bool) {
		qArm := math.Sqrt(max(v*v-p*p, 0))
		stable := func(q float64) (bool, error) { return u.avrStableTab(c, p, q, v) }
		it := u.tabInterval(c, &scratch, p, v, qArm, -qArm, -qArm-tabDeep-scanFloor)
		return it, it.err == nil && it.low.OK && hasIsland(stable, it.low.V, -qArm-tabDeep-scanFloor)
	}); err != nil {
		return nil, err
	}
	t.low = make([]int16, n)
	for k, q := range low {
		t.low[k] = tabNone
		if !math.IsNaN(q) {
			t.low[k] = toQ16(q)
		}
	}
	for k := range moved {
		if moved[k] {
			t.top, t.moved = make([]int16, n), moved
			for k, q := range top {
				t.top[k] = toQ16(q)
			}
			break
		}
	}
	return t, nil
}

// tabScratch is the build's reusable space for tabScanDown's samples.
type tabScratch struct {
	seen []tabSample
}

// tabInterval is the rule at one point of the table's grid (p, v), below
// q_max = qTop, the top looked for down to qBot and the bottom down to
// floor: where q_max is stable (nearly always) the band detector
// tabScanDown finds the first unstable q, then bisection to tabTol; where
// it is not, and always with zeta_min > 0, the rule with the plain scan
// of tabScanStep (topIntervalTo).
func (u *Unit) tabInterval(c *charParts, sc *tabScratch, p, v, qTop, qBot, floor float64) interval {
	stable := func(q float64) (bool, error) { return u.avrStableTab(c, p, q, v) }
	if u.p.ZetaMin > 0 {
		// The damping rule is decided by eigenvalues, which give no
		// margins: the plain scan.
		return topIntervalTo(stable, qTop, qBot, floor, tabScanStep, tabTol)
	}
	s, err := u.tabTest(c, p, qTop, v)
	if err != nil {
		return interval{err: err}
	}
	if !s.stable {
		return topIntervalTo(stable, qTop, qBot, floor, tabScanStep, tabTol)
	}
	st, un, found, err := u.tabScanDown(c, sc, p, v, s, floor)
	if err != nil {
		return interval{err: err}
	}
	if !found {
		return interval{low: some(floor)}
	}
	q, err := u.tabBoundary(c, p, v, st, un)
	if err != nil {
		return interval{err: err}
	}
	return interval{low: some(q)}
}

// tabDeep is how much deeper than the direct scan the table's build
// looks for q_stability, pu: the per-sample path cuts the table's answer
// at the direct scan's floor (scanFloor below the sample's armature lower
// bound, which a coolant factor above 1 lowers), so the table must hold
// the limit itself below that floor, not a floor of its own.
const tabDeep = 0.5

// tabNear is how far, pu, the rule's answer at a cell's centre may lie
// from the mean of its four nodes before the cell is not read (markScan).
const tabNear = 0.01

// tabSmooth is the interpolation error, pu, below which a cell is
// trusted without a check: bilinear interpolation errs by about an
// eighth of the second difference across the cell in each direction
// (h^2 |f”|/8), to which the nodes' own error (tabTol/2) adds: 1e-3 +
// 5e-5 leaves a margin to the 0.002 pu the fast answer is held to.
const tabSmooth = 1e-3

// markSmooth marks the cells whose four nodes all have stable operation,
// agree on whether q_max moves, and whose second differences (of
// q_stability and of the top, along p and v, at the nodes or their inner
// neighbours on an edge) promise an interpolation error below tabSmooth.
// A kink or a jump between two nodes shows in the second differences of
// both, so the cells on either side are checked at every sample instead.
func (t *stabTable) markSmooth(low, top []float64, moved []bool) {
	est := make([]float64, len(low)) // the interpolation error about node k
	d2 := func(f []float64, a, b, c int) float64 {
		return math.Abs(f[a] - 2*f[b] + f[c])
	}
	for iv := range t.nv {
		for ip := range t.np {
			cp := min(max(ip, 1), t.np-2)
			cv := min(max(iv, 1), t.nv-2)
			kp, kv := iv*t.np+cp, cv*t.np+ip
			e := d2(low, kp-1, kp, kp+1) + d2(low, kv-t.np, kv, kv+t.np)
			if moved[kp-1] || moved[kp] || moved[kp+1] || moved[kv-t.np] || moved[kv] || moved[kv+t.np] {
				// The top is interpolated only where it moved.
				e += d2(top, kp-1, kp, kp+1) + d2(top, kv-t.np, kv, kv+t.np)
			}
			if math.IsNaN(e) {
				e = math.Inf(1)
			}
			est[iv*t.np+ip] = e / 8
		}
	}
	t.smooth = make([]bool, (t.np-1)*(t.nv-1))
	for iv := range t.nv - 1 {
		for ip := range t.np - 1 {
			k := iv*t.np + ip
			ok := true
			for _, j := range [4]int{k, k + 1, k + t.np, k + t.np + 1} {
				ok = ok && est[j] < tabSmooth && moved[j] == moved[k]
			}
			// Near p = 0 the model changes character (sin(delta) -> 0 cuts the
			// field's coupling to the rotor): the first cell is never trusted.
			t.smooth[iv*(t.np-1)+ip] = ok && ip > 0
		}
	}
}

// fastInterval is the rule's answer for the per-sample path at p >= 0,
// v, below qTop and down to qBot. In a cell of the table marked smooth
// it is the interpolation alone. In other cells the answer is checked
// with Routh-Hurwitz tests: stable tabCheck above the interpolated
// q_stability and unstable tabCheck below it, which puts the limit within
// tabCheck of the answer, and the same about a moved top, or q_max
// stable where the top does not move. Where that check fails or cannot
// tell (a cell marked scan, an answer near the direct scan's floor), the
// answer is checked by the band detector (detectInterval), and failing
// that the rule is applied as the build applies it, held to the direct
// scan's grid (sampleRule): some twenty to thirty Routh-Hurwitz tests.
// Where those fail too, the table has no answer (outside its grid, no
// stable operation, a stable interval above q_max), the Routh test is
// not sure, p lies in the first cell or zeta_min > 0, the rule itself is
// applied with the Routh-Hurwitz test (the direct computation's scan,
// some tens of microseconds), bisected to fastTol so that Complete and
// Evaluate agree to it whatever q_max each starts from. Every step is a
// function of the sample alone (no history): Complete, which evaluates
// again with the same q_max, gets the same answer.
func (u *Unit) fastInterval(p, v, qTop, qBot float64) interval {
	c := &u.avrChar
	iv, ok, smooth := u.avrTab.lookup(p, v, qTop)
	// Near p = 0 (the table's first cell) the rotor's coupling to the
	// field vanishes and the limit is not smooth enough in p for the
	// bracket check to hold it: the rule is applied (tested against the
	// example and demo fleets, TestFleetAVRFastAnswerAgrees).
	ok = ok && p >= tabPStep
	check := func(q float64) (bool, error) { return u.avrStableFast(c, p, q, v, 0) }
	topHolds := func() bool {
		if iv.top.OK {
			return bracketHolds(check, iv.top.V, qTop, false)
		}
		s, err := check(qTop) // q_max itself stable: it does not move
		return err == nil && s
	}
	// The direct scan stops at its floor, scanFloor below qBot, and
	// reports q_stability there when the interval reaches it; the table
	// holds the limit deeper (tabDeep), so its answer is cut at the floor.
	// In a smooth cell the table is within tabSmooth of the limit, and the
	// cut answer within tabSmooth of the direct one. Elsewhere near or
	// below the floor the bracket check has no boundary to find (and an
	// island below an unstable band would pass a test at the floor): the
	// rule is applied.
	if floor := qBot - scanFloor; ok && iv.low.OK && iv.low.V < floor+tabCheck {
		if !smooth {
			ok = false
		} else if iv.low.V < floor {
			iv.low = some(floor)
		}
	}
	if ok && smooth {
		return iv
	}
	if ok && iv.low.OK && bracketHolds(check, iv.low.V, qTop, true) && topHolds() {
		return iv
	}
	if p >= tabPStep && u.p.ZetaMin == 0 {
		if iv.low.OK {
			if s, ok := u.detectInterval(c, p, v, iv, qTop, qBot); ok {
				return s
			}
		}
		if s, ok := u.sampleRule(c, p, v, iv, qTop, qBot); ok {
			return s
		}
	}
	stable := func(q float64) (bool, error) { return u.avrStableFast(c, p, q, v, ssGrowth) }
	return topInterval(stable, qTop, qBot, scanStep, fastTol)
}

// detectInterval checks the table's answer iv where the bracket check
// does not hold or cannot tell: in a cell marked scan (a node has a
// stable island below q_stability, hasIsland), where a boundary within
// tabCheck of the interpolated limit L may be an island's bottom rather
// than the topmost interval's, and near the direct scan's floor. It
// takes L when the band detector of the table's build (tabScanDown, the
// standard by which the nodes' limits were found) finds no unstable q
// from the top down to L + tabCheck, and L - tabCheck is unstable: the
// topmost interval then reaches down to within tabCheck of L and ends
// there. Where L lies tabCheck or more below the direct scan's floor,
// stable down to the floor gives the floor. The top: q_max stable
// (whatever the table says, the top does not move: the direct scan
// starts there), or a moved top within tabCheck of the table's (a
// bracket, as fastInterval checks it). Some twenty Routh-Hurwitz tests
// against the direct scan's hundred and more over a long interval. ok is
// false where the check does not hold or does not apply (L within
// tabCheck of the floor, q_max unstable without a moved top in the
// table): the caller applies the rule.
func (u *Unit) detectInterval(c *charParts, p, v float64, iv interval, qTop, qBot float64) (interval, bool) {
	floor, low := qBot-scanFloor, iv.low.V
	to := low + tabCheck
	switch {
	case low <= floor-tabCheck:
		to = floor
	case low < floor+tabCheck:
		return interval{}, false
	}
	a, err := u.tabTest(c, p, qTop, v)
	if err != nil {
		return interval{}, false
	}
	switch {
	case a.stable:
		iv.top = Bound{}
	case !iv.top.OK:
		return interval{}, false
	default:
		// q_max unstable, the top moved: a bracket about the table's
		// top, and the interval looked through from just under it.
		if a, err = u.tabTest(c, p, iv.top.V-tabCheck, v); err != nil || !a.stable || a.q <= to {
			return interval{}, false
		}
		if s, err := u.avrStableFast(c, p, min(iv.top.V+tabCheck, qTop), v, 0); err != nil || s {
			return interval{}, false
		}
	}
	if to == floor {
		iv.low = some(floor)
	} else if s, err := u.avrStableFast(c, p, low-tabCheck, v, 0); err != nil || s {
		return interval{}, false // the cheap half of the bracket first
	}
	var seen [tabScanCap]tabSample
	sc := tabScratch{seen: seen[:0]}
	if _, _, found, err := u.tabScanDown(c, &sc, p, v, a, to); err != nil || found {
		return interval{}, false
	}
	return iv, true
}

// sampleRule applies the rule at one sample as the table's build does
// at a node (the band detector, then regula falsi to tabTol: some thirty
// Routh-Hurwitz tests), where the table's answer does not check, and
// holds it to the direct scan's grid: the direct scan tests q_max and
// every scanStep below it (below the top, when that moved), so it sees
// the boundary the detector found only when its first test beyond the
// boundary falls on the same side; one test there, and one on the grid
// point above, confirm that, or the caller applies the rule by the
// direct scan (a band narrower than scanStep, which the detector sees
// and the scan may not). Where q_max is unstable, the top is looked for
// about the table's (a moved top at a node around): the first stable
// point of the grid below it, walking at most four points either way,
// and regula falsi to tabTol between it and the unstable one above. ok
// is false where a test fails, q_max is unstable without a top in the
// table, or the walk does not find the top.
func (u *Unit) sampleRule(c *charParts, p, v float64, iv interval, qTop, qBot float64) (interval, bool) {
	floor := qBot - scanFloor
	a, err := u.tabTest(c, p, qTop, v)
	if err != nil {
		return interval{}, false
	}
	var res interval
	g0 := qTop // the direct scan's grid: g0 - k scanStep
	if !a.stable {
		if !iv.top.OK {
			return interval{}, false
		}
		k := max(1, int(math.Ceil((qTop-iv.top.V)/scanStep)))
		at := func(k int) (tabSample, bool) {
			q := qTop - float64(k)*scanStep
			if k <= 0 || q < qBot {
				return tabSample{}, false
			}
			s, err := u.tabTest(c, p, q, v)
			return s, err == nil
		}
		lo, ok := at(k)
		if !ok {
			return interval{}, false
		}
		hi := a
		found := false
		for range 4 {
			if !lo.stable {
				// The top lies lower: one grid point down.
				hi = lo
				if k++; k <= 0 {
					return interval{}, false
				}
				if lo, ok = at(k); !ok {
					return interval{}, false
				}
				continue
			}
			if k == 1 {
				hi, found = a, true // q_max, unstable
				break
			}
			if hi, ok = at(k - 1); !ok {
				return interval{}, false
			}
			if !hi.stable {
				found = true
				break
			}
			// The top lies higher: one grid point up.
			k--
			lo = hi
		}
		if !found || !lo.stable || hi.stable || hi.q-lo.q > scanStep*1.5 {
			return interval{}, false
		}
		t, err := u.tabBoundary(c, p, v, lo, hi)
		if err != nil {
			return interval{}, false
		}
		res.top, a, g0 = some(t), lo, t
	}
	var seen [tabScanCap]tabSample
	sc := tabScratch{seen: seen[:0]}
	st, un, found, err := u.tabScanDown(c, &sc, p, v, a, floor)
	if err != nil {
		return interval{}, false
	}
	if !found {
		res.low = some(floor)
		return res, true
	}
	b, err := u.tabBoundary(c, p, v, st, un)
	if err != nil {
		return interval{}, false
	}
	// The direct scan's grid points about b: unstable just below (or
	// the floor), stable just above (or the top).
	k := math.Ceil((g0 - b) / scanStep)
	below, above := max(g0-k*scanStep, floor), g0-(k-1)*scanStep
	if sb, err := u.avrStableFast(c, p, below, v, 0); err != nil || sb {
		return interval{}, false
	}
	if k > 1 {
		if sa, err := u.avrStableFast(c, p, above, v, 0); err != nil || !sa {
			return interval{}, false
		}
	}
	res.low = some(b)
	return res, true
}

// tabScanCap is the room for detectInterval's samples (tabScanDown's)
// on the stack: some twenty are taken over 2.5 pu; beyond the room,
// append moves them to the heap (an allocation, not an error).
const tabScanCap = 96

// fastTol is the bisection tolerance of the per-sample path's own scan, pu.
const fastTol = 1e-8

// bracketHolds says whether a stability boundary lies within tabCheck of
// q (at most up to qTop): for a bottom (q_stability) stable just above
// and unstable just below, for a moved top the other way round.
func bracketHolds(stable func(float64) (bool, error), q, qTop float64, bottom bool) bool {
	sLo, err1 := stable(q - tabCheck)
	sHi, err2 := stable(min(q+tabCheck, qTop))
	return err1 == nil && err2 == nil && sLo != sHi && sHi == bottom
}

// lookup interpolates the table at p >= 0 and v below q_max = qTop; ok
// is false outside the grid. Where the four nodes around the point
// disagree on feasibility, the nearest node decides, and the feasible
// nodes are interpolated among themselves; q_max moves when a node
// around the point moves and the interpolated top lies below qTop.
//
// A voltage off the grid is extrapolated along v from the three rows at
// the grid's edge (Newton's backward-difference formula, quadratic),
// never as smooth: the caller checks it.
//
// In a cell marked scan ok is false, and iv is the interpolated answer
// all the same (for detectInterval's check).
func (t *stabTable) lookup(p, v, qTop float64) (iv interval, ok, smooth bool) {
	x := p / t.pStep
	y := (v - t.v0) * t.vInv
	if !(x >= 0) || x > float64(t.np-1) || math.IsNaN(y) {
		return interval{}, false, false
	}
	var low, top float64
	moved, none, scan := false, false, false
	switch last := float64(t.nv - 1); {
	case y >= 0 && y <= last:
		low, top, moved, none, smooth, scan = t.at(x, y)
	case y > last && y-last <= 2 || y < 0 && y >= -2:
		// d rows beyond the edge row e, with rows e-s and e-2s inside.
		e, s, d := last, 1.0, y-last
		if y < 0 {
			e, s, d = 0, -1, -y
		}
		var f [3]float64
		var g [3]float64
		for i := range f {
			l, tp, mv, nn, _, sc := t.at(x, e-s*float64(i))
			if nn || sc {
				return interval{}, false, false
			}
			f[i], g[i], moved = l, tp, moved || mv
		}
		ext := func(f [3]float64) float64 {
			return f[0] + d*(f[0]-f[1]) + d*(d+1)/2*(f[0]-2*f[1]+f[2])
		}
		low, top = ext(f), ext(g)
	default:
		return interval{}, false, false
	}
	if none {
		return interval{}, !scan, smooth && !scan // no stable operation
	}
	if moved && top < qTop {
		iv.top = some(top)
		qTop = top
	}
	if low >= qTop {
		return interval{}, !scan, false // the stable interval lies above q_max
	}
	iv.low = some(low)
	return iv, !scan, smooth && !scan
}

// at interpolates the table at grid coordinates x (along p) and y (along
// v), both inside the grid: q_stability, the top, whether the top moved
// at a node around, whether the nearest node has no stable operation,
// and whether the cell is smooth (or, with none, whether no node around
// has stable operation).
func (t *stabTable) at(x, y float64) (low, top float64, moved, none, smooth, scan bool) {
	ip, jv := int(x), int(y)
	if ip == t.np-1 {
		ip--
	}
	if jv == t.nv-1 {
		jv--
	}
	wx, wy := x-float64(ip), y-float64(jv)
	k := jv*t.np + ip
	smooth, scan = t.smooth[jv*(t.np-1)+ip], t.scan[jv*(t.np-1)+ip]
	idx := [4]int{k, k + 1, k + t.np, k + t.np + 1}
	w := [4]float64{(1 - wx) * (1 - wy), wx * (1 - wy), (1 - wx) * wy, wx * wy}
	near := 0
	for i := range w {
		if w[i] > w[near] {
			near = i
		}
	}
	if t.low[idx[near]] == tabNone {
		// No stable operation; trusted without a check when no node
		// around has any.
		all := true
		for _, j := range idx {
			all = all && t.low[j] == tabNone
		}
		return 0, 0, false, true, all, scan
	}
	var sw float64
	for i, j := range idx {
		if t.low[j] == tabNone {
			continue
		}
		low += w[i] * float64(t.low[j])
		if t.moved != nil {
			top += w[i] * float64(t.top[j])
			moved = moved || t.moved[j] && w[i] > 0
		}
		sw += w[i]
	}
	return low / sw * tabQuant, top / sw * tabQuant, moved, false, smooth, scan
}

// tabSample is the table build's test at one q: the verdict, and the
// three margins whose zeros are the only places where the verdict can
// change along q. f[0] = Delta_(n-1) and f[1] = a_0 (up to the positive
// leading coefficient, which does not depend on q): a root crosses the
// imaginary axis as a pair +-j w only where Delta_(n-1) = 0 (Orlando's
// formula: Delta_(n-1) = +-a_n^(n-1) times the product of the sums of
// pairs of roots) and at 0 only where a_0 = 0 (Gantmacher, The Theory of
// Matrices, vol. 2, ch. XV, from memory); f[2] = E_fd0 - E_fd,min. All
// three are smooth in q. Where the Routh-Hurwitz criterion is not sure
// (the verdict then comes from the eigenvalues) or the point is
// degenerate, f holds NaN.
type tabSample struct {
	q      float64
	stable bool
	f      [3]float64
}

// tabTest is avrStableTab (the same verdict) with the margins of
// tabSample, which the fraction-free Routh array holds (routh): its
// first column is Delta_1 .. Delta_n, and a_0 is the last coefficient.
func (u *Unit) tabTest(c *charParts, p, q, v float64) (tabSample, error) {
	s := tabSample{q: q, f: [3]float64{math.NaN(), math.NaN(), math.NaN()}}
	k := c.hp.core(p, q, v)
	if k.degener {
		return s, nil
	}
	efdOK := k.efd >= u.p.Exciter.EfdMin
	if u.p.ZetaMin != 0 {
		if !efdOK {
			return s, nil
		}
		st, err := u.avrStableTab(c, p, q, v)
		s.stable = st
		return s, err
	}
	cp := c.charPoly(&k)
	st, sure, dn1, a0 := routh(&cp, 0, true)
	switch {
	case sure && !math.IsNaN(dn1):
		s.stable = st && efdOK
		s.f = [3]float64{dn1, a0, k.efd - u.p.Exciter.EfdMin}
		return s, nil
	case sure || !efdOK:
		return s, nil // unstable (an entry clearly negative, or E_fd0 below its minimum); margins unknown
	}
	// What avrStableTab does after the criterion at sigma = 0 is not sure.
	if st, sure := hurwitz(&cp, ssGrowth); sure {
		s.stable = st
		return s, nil
	}
	st, err := u.avrStable(p, q, v)
	s.stable = st
	return s, err
}

// The band detector of the table's build (tabScanDown): tests
// tabCoarseStep apart and at the middle of each step; a step whose
// margins (tabSample, in logarithms of their size) dip or bend by more
// than tabBend (a factor of 1.65), or change sign, is halved, down to
// tabFineStep; then every local minimum of a margin is probed
// (probeMinima). Measured against a scan in 0.001 pu steps at the nodes
// and centres of a grid twice as fine as the table's, on seeded random
// units of TestRandomUnitsFastAnswer's kind (four seeds, its own among
// them, 380 units, 161,547 points): no boundary missed that the 0.04 pu
// scan it replaced found (that scan missed 20 the detector found), with
// 21 tests a point against the scan's 52, both with the bisection. Steps
// of 0.2 pu took 27 tests; 0.4 pu (20 tests) missed 2 boundaries of one
// unit the scan found, 0.6 pu (18 tests) 3.
const (
	tabCoarseStep = 0.3
	tabFineStep   = 0.02
	tabBend       = 0.5
)

// tabScanDown looks down from the stable sample a to floor for the first
// unstable q. found: un is unstable and st, the stable sample above it,
// lies at most tabScanStep higher. Not found: every test down to floor
// was stable. It tests at coarse steps of tabCoarseStep and at the middle
// of each step, and halves a step (recursively, down to tabFineStep)
// where the margins, interpolated by the parabola through the three
// samples, dip by more than tabBend below their ends or bend by more
// than tabBend (suspicious): a band of instability opens only where a
// margin falls to zero, and one that does so inside a step without
// showing at its ends and middle is neither flat nor a parabola there.
func (u *Unit) tabScanDown(c *charParts, sc *tabScratch, p, v float64, a tabSample, floor float64) (st, un tabSample, found bool, err error) {
	// The stable samples, by q descending, for probeMinima: a sample is
	// tested between two it lies next to, so it moves a few places.
	// The scratch is not written back (a slice that outgrows it is
	// dropped with the call): sc may then live on the caller's stack, as
	// detectInterval's does.
	seen, record := append(sc.seen[:0], a), true
	test := func(q float64) (tabSample, error) {
		s, err := u.tabTest(c, p, q, v)
		if err == nil && s.stable && record {
			seen = append(seen, s)
			for j := len(seen) - 1; j > 0 && seen[j-1].q < s.q; j-- {
				seen[j-1], seen[j] = seen[j], seen[j-1]
			}
		}
		return s, err
	}
	var check func(a, b tabSample) (tabSample, tabSample, bool, error)
	// narrow closes in on the first unstable q in [b, a] (a stable, b
	// unstable) to a bracket of tabScanStep, halving it and looking into
	// a stable upper half as check does.
	narrow := func(a, b tabSample) (tabSample, tabSample, bool, error) {
		for a.q-b.q > tabScanStep {
			m, err := test(0.5 * (a.q + b.q))
			if err != nil {
				return a, b, false, err
			}
			if !m.stable {
				b = m
				continue
			}
			if st, un, ok, err := check(a, m); ok || err != nil {
				return st, un, ok, err
			}
			a = m
		}
		return a, b, true, nil
	}
	check = func(a, b tabSample) (tabSample, tabSample, bool, error) {
		if a.q-b.q <= tabFineStep {
			return a, b, false, nil
		}
		m, err := test(0.5 * (a.q + b.q))
		if err != nil {
			return a, b, false, err
		}
		if !m.stable {
			return narrow(a, m)
		}
		if !suspicious(&a, &m, &b) {
			return a, b, false, nil
		}
		if st, un, ok, err := check(a, m); ok || err != nil {
			return st, un, ok, err
		}
		return check(m, b)
	}
	scan := func(a tabSample) (tabSample, tabSample, bool, error) {
		for a.q > floor {
			b, err := test(max(a.q-tabCoarseStep, floor))
			if err != nil {
				return a, b, false, err
			}
			if !b.stable {
				return narrow(a, b)
			}
			if st, un, ok, err := check(a, b); ok || err != nil {
				return st, un, ok, err
			}
			a = b
		}
		return a, a, false, nil
	}
	if st, un, found, err = scan(a); err != nil {
		return st, un, found, err
	}
	// A margin's dip below zero narrower than the samples shows as a
	// local minimum of the margin: probe there.
	// The samples of the scan are all probeMinima looks at: its tests and
	// narrow's after it are not recorded (the list is read no more).
	sorted := seen
	record = false
	pr, ok, err := probeMinima(test, sorted)
	if err != nil || !ok || found && pr.q <= un.q {
		return st, un, found, err
	}
	// The first unstable q lies between pr and the stable sample above it.
	above := sorted[0]
	for _, x := range sorted {
		if x.q > pr.q && x.q < above.q {
			above = x
		}
	}
	return narrow(above, pr)
}

// probeMinima looks at every local minimum of a margin among the stable
// samples s (sorted by q, descending) for a dip below zero between them:
// it probes the vertex of the parabola through the minimum and its two
// neighbours while the parabola promises a bottom below 0.9 of the
// smallest sample, up to four times a minimum, moving the three points in
// on the bottom (successive parabolic interpolation). ok: an unstable
// probe pr (the highest found).
func probeMinima(test func(float64) (tabSample, error), s []tabSample) (pr tabSample, ok bool, err error) {
	var margins tabSample
	for i := range margins.f {
		for k := 1; k+1 < len(s); k++ {
			if f1 := s[k].f[i]; !(f1 > 0 && f1 < s[k-1].f[i] && f1 <= s[k+1].f[i]) || ok && s[k-1].q <= pr.q {
				continue
			}
			x := [3]tabSample{s[k-1], s[k], s[k+1]}
			for range 4 {
				q0, q1, q2 := x[0].q, x[1].q, x[2].q
				f0, f1, f2 := x[0].f[i], x[1].f[i], x[2].f[i]
				// The parabola f = A q^2 + B q + C through the three points.
				d := (q0 - q1) * (q0 - q2) * (q1 - q2)
				A := (q2*(f1-f0) + q1*(f0-f2) + q0*(f2-f1)) / d
				B := (q2*q2*(f0-f1) + q1*q1*(f2-f0) + q0*q0*(f1-f2)) / d
				if !(A > 0) {
					break
				}
				qv := -B / (2 * A)
				fv := f1 - A*(qv-q1)*(qv-q1) // the parabola at its vertex
				if !(fv < 0.9*f1) || !(qv > q2 && qv < q0) || math.Abs(qv-q1) < tabTol {
					break
				}
				y, err := test(qv)
				if err != nil {
					return pr, false, err
				}
				if !y.stable {
					if !ok || y.q > pr.q {
						pr, ok = y, true
					}
					break
				}
				switch {
				case qv > q1 && y.f[i] < f1:
					x = [3]tabSample{x[0], y, x[1]}
				case qv > q1:
					x = [3]tabSample{y, x[1], x[2]}
				case y.f[i] < f1:
					x = [3]tabSample{x[1], y, x[2]}
				default:
					x = [3]tabSample{x[0], x[1], y}
				}
			}
		}
	}
	return pr, ok, nil
}

// suspicious says whether a margin, known at the ends a, b and the
// middle m of a step, may fall to zero inside it: it changes sign or is
// unknown (NaN) there, or in the logarithms of its size the middle lies
// more than tabBend/2 below the lower end, or their second difference
// exceeds tabBend (the step does not resolve it). With the second
// difference within tabBend, the parabola through the three logarithms
// lies at most tabBend/2 below the middle between the ends, so the test
// on the middle keeps the parabola within tabBend of the lower end. It
// works on ratios (exp(-tabBend/2) <= m/min(a, b), and exp(-tabBend) <=
// ab/m^2 <= exp(tabBend)), which need no logarithm.
func suspicious(a, m, b *tabSample) bool {
	for i := range a.f {
		fa, fm, fb := a.f[i], m.f[i], b.f[i]
		if !(fa > 0 && fm > 0 && fb > 0) {
			if !(fa < 0 && fm < 0 && fb < 0) {
				return true // a change of sign, a zero or NaN
			}
			fa, fm, fb = -fa, -fm, -fb
		}
		r := (fa / fm) * (fb / fm)
		if !(r >= tabBendLo && r <= tabBendHi) || fm < tabDipLo*min(fa, fb) {
			return true // NaN included (an overflow)
		}
	}
	return false
}

// exp(-tabBend), exp(tabBend), exp(-tabBend/2) (TestTabBendRatios).
const (
	tabBendLo = 0.6065306597126334
	tabBendHi = 1.6487212707001282
	tabDipLo  = 0.7788007830714049
)

// tabBoundary narrows the bracket of a boundary, st stable and un
// unstable, to tabTol and returns its middle: by regula falsi on a margin
// that is positive at st and negative at un (the Illinois variant, which
// halves the weight of an end that stays; each estimate is tested a third
// of tabTol past the root, away from the end that moved last, so that the
// bracket closes from both sides), else, or after 12 tests, by bisection.
func (u *Unit) tabBoundary(c *charParts, p, v float64, st, un tabSample) (float64, error) {
	i := -1
	for j := range un.f {
		if st.f[j] > 0 && un.f[j] < 0 {
			i = j
			break
		}
	}
	lastSt := false
	fs, fu := 0.0, 0.0
	if i >= 0 {
		fs, fu = st.f[i], un.f[i]
	}
	for n := 0; math.Abs(st.q-un.q) > tabTol; n++ {
		q := 0.5 * (st.q + un.q)
		if i >= 0 && n < 12 {
			q = st.q + (un.q-st.q)*fs/(fs-fu)
			dir := math.Copysign(1, un.q-st.q) // toward un
			if !lastSt {
				dir = -dir
			}
			q += dir * tabTol / 3
			lo, hi := min(st.q, un.q), max(st.q, un.q)
			q = max(lo+tabTol/4, min(hi-tabTol/4, q))
		}
		s, err := u.tabTest(c, p, q, v)
		if err != nil {
			return 0, err
		}
		if s.stable {
			if lastSt {
				fu /= 2
			}
			st, fs, lastSt = s, s.f[max(i, 0)], true
		} else {
			if !lastSt && n > 0 {
				fs /= 2
			}
			un, fu, lastSt = s, s.f[max(i, 0)], false
		}
		if i >= 0 && !(fs > 0 && fu < 0) {
			i = -1 // the margin does not bracket the boundary: bisect
		}
	}
	return 0.5 * (st.q + un.q), nil
}
