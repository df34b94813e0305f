package limits

import "math"

// Hint carries one unit's previous solution of the iterative limit
// curves, so that the next sample, usually a small step away, starts
// there: a warm-started Newton step on the field limit, a narrow bracket
// on the stability limits. The zero Hint is valid and means "no previous
// solution". A Hint belongs to one unit and one goroutine at a time; it
// changes only the work done, never the result beyond the root tolerance.
// (The practical limit with a margin takes nothing from it: its rule is
// a scan from q_stability, see practicalLimit.)
type Hint struct {
	field, stab float64
	stabSlope   float64 // d/dq of the stability functions at the last roots
	has         uint8   // bit set of hintField, hintStab, hintCoolant

	// The coolant factors of the last coolant value: coolant quantities
	// change slowly, so most samples repeat the last value.
	coolant, armF, fieldF float64
	coolInside            bool
}

const (
	hintField = 1 << iota
	hintStab
	hintCoolant
)

func (h *Hint) get(bit uint8) (float64, bool) {
	if h == nil || h.has&bit == 0 {
		return 0, false
	}
	if bit == hintField {
		return h.field, true
	}
	return h.stab, true
}

func (h *Hint) set(bit uint8, b Bound) {
	if h == nil {
		return
	}
	if !b.OK {
		h.has &^= bit
		return
	}
	h.has |= bit
	if bit == hintField {
		h.field = b.V
	} else {
		h.stab = b.V
	}
}

// Bounds returns the limit curves at active power p and terminal voltage
// v (pu), with the armature and field ratings multiplied by the coolant
// factors armF and fieldF. h may be nil.
//
// Bounds is the direct computation on both stability bases (on the avr
// basis a search of tens of microseconds, see avrInterval); only Evaluate and EvaluateSample with a Hint take the
// per-sample table (see stabTable).
func (u *Unit) Bounds(p, v, armF, fieldF float64, h *Hint) Bounds {
	b, _ := u.bounds(p, v, armF, fieldF, h, true, false)
	return b
}

// bounds computes the limit curves. With full false it may leave the
// field-limit curve, and so q_max, unsolved (deferred true) when nothing
// else at this point depends on its value: see deferredBounds. With fast
// true the avr basis reads its stability limit from the unit's table.
func (u *Unit) bounds(p, v, armF, fieldF float64, h *Hint, full, fast bool) (b Bounds, deferred bool) {
	iMax := armF
	r := v * iMax
	if math.Abs(p) <= r {
		a := math.Sqrt(r*r - p*p)
		b.ArmatureUp, b.ArmatureDown = some(a), some(-a)
	}
	ifdMax := u.ifdRated * fieldF
	if !full && b.ArmatureUp.OK {
		if d, ok := u.deferredBounds(p, v, ifdMax, b, h, fast); ok {
			return d, true
		}
	}
	b.Field = u.fieldLimit(p, v, ifdMax, h)
	b.upperBound()

	if b.QMax.OK {
		var s stabLimits
		u.stabilityLimits(math.Abs(p), v, b.QMax.V, b.ArmatureDown.V, h, fast, &s)
		b.setStability(s)
	}
	b.EndRegion = u.endRegionAt(p, v)
	b.UEL = u.UELAt(p, v)
	b.lowerBound()
	return b, false
}

// upperBound sets b's upper bound from its armature and field curves:
// q_max = min of the two, naming the one that binds.
func (b *Bounds) upperBound() {
	switch {
	case !b.ArmatureUp.OK:
		b.QMaxLimit = LimitArmature
	case !b.Field.OK:
		b.QMaxLimit = LimitField
	case b.Field.V < b.ArmatureUp.V:
		b.QMax, b.QMaxLimit = b.Field, LimitField
	default:
		b.QMax, b.QMaxLimit = b.ArmatureUp, LimitArmature
	}
}

// setStability puts the stability limits s into b: when q_max itself is
// unstable, q_max moves down to the top of the topmost stable interval,
// and the limit that binds it is stability (envelope.md, "Which stable
// interval, and the limit").
func (b *Bounds) setStability(s stabLimits) {
	b.Stability, b.Practical, b.StabilityTop, b.StabilityErr = s.theo, s.prac, s.top, s.err
	if s.top.OK && (!b.QMax.OK || s.top.V < b.QMax.V) {
		b.QMax, b.QMaxLimit = s.top, LimitStability
	}
}

// lowerBound sets b's lower bound from its armature, practical stability,
// end-region and underexcitation-limiter curves: q_min = max of the four,
// naming the one that binds (envelope.md, "The lower bound"). A UEL curve
// with no value at this p does not bound q.
func (b *Bounds) lowerBound() {
	switch {
	case !b.ArmatureDown.OK:
		b.QMinLimit = LimitArmature
	case !b.Practical.OK:
		b.QMinLimit = LimitStability
	default:
		b.QMin, b.QMinLimit = b.ArmatureDown, LimitArmature
		if b.Practical.V > b.QMin.V {
			b.QMin, b.QMinLimit = b.Practical, LimitStability
		}
		if b.EndRegion.OK && b.EndRegion.V > b.QMin.V {
			b.QMin, b.QMinLimit = b.EndRegion, LimitEndRegion
		}
		if b.UEL.OK && b.UEL.V > b.QMin.V {
			b.QMin, b.QMinLimit = b.UEL, LimitUEL
		}
	}
}

// endRegionAt returns the end-region curve at p and v.
func (u *Unit) endRegionAt(p, v float64) Bound {
	if !u.hasEnd {
		return Bound{}
	}
	q := u.endRegion.Predict(p)
	if k := u.p.EndRegion.VoltageExponent; k != 0 {
		q *= math.Pow(v, k)
	}
	return some(q)
}

// deferredBounds computes the lower side of the envelope without solving
// the field limit, which a service needs only when someone reads q_max.
// The stability limits are searched below the armature circle instead of
// below q_max; that finds the same roots, and the practical limit's scan
// (practicalLimit) looks at the same grid points, whenever they lie below
// q_max, which holds exactly when the field current at the highest of
// q_min and the scan's last point is within its rating (i_fd rises with q
// above -v^2/Xq), checked with one evaluation of the field model instead
// of a root. Whenever a limit reaches the top of its search, or that
// check fails, ok is false and the caller solves the full envelope, so
// the result is always Bounds' own.
func (u *Unit) deferredBounds(p, v, ifdMax float64, b Bounds, h *Hint, fast bool) (Bounds, bool) {
	qTop := b.ArmatureUp.V
	var s stabLimits
	u.stabilityLimits(math.Abs(p), v, qTop, b.ArmatureDown.V, h, fast, &s)
	if !s.theo.OK || !s.prac.OK || s.theo.V >= qTop || s.top.OK || s.err != nil {
		return b, false
	}
	b.Stability, b.Practical = s.theo, s.prac
	b.EndRegion = u.endRegionAt(p, v)
	b.UEL = u.UELAt(p, v)
	b.lowerBound()
	qMin := b.QMin.V
	if qMin > qTop {
		return b, false
	}
	// One evaluation settles it: above lo, i_fd(q_min) within the rating
	// means the field limit exists and lies above q_min (i_fd rises
	// without bound); below lo, the field limit exists above lo, and so
	// above q_min, when i_fd(lo) is within the rating. With a margin the
	// practical scan's last point (s.scanned, at most qTop, the scan's
	// own top) is checked with q_min: below q_max the scan with q_max as
	// its top looks at the same points and closes the same bracket
	// (without one the practical limit is q_stability, below q_min).
	at := max(qMin, -v*v/u.p.Xq)
	if u.marginPU > 0 {
		at = max(at, s.scanned)
	}
	if u.field(p, at, v, false).ifd >= ifdMax {
		return b, false
	}
	return b, true
}

// fieldLimit solves i_fd(p, q, v) = ifdMax for q on the branch where the
// field current rises with q, above q = -v^2/Xq. Safeguarded Newton:
// i_fd is increasing and convex in q there, so the iteration converges
// from either side; a bracket is kept, and a step that leaves it
// bisects (or, before an upper end is known, doubles). The cold start is
// the unsaturated round-rotor circle q = -v^2/Xd + sqrt((v E/Xd)^2 - p^2)
// with E = ifdMax, which lies above the root since saturation only adds
// to the field current.
func (u *Unit) fieldLimit(p, v, ifdMax float64, h *Hint) Bound {
	lo := -v * v / u.p.Xq
	loChecked := false // f(lo) < 0 is known: a root exists above lo
	hi := math.Inf(1)
	x, ok := h.get(hintField)
	if !ok || x <= lo {
		x = lo + 1
		r := v * ifdMax / u.p.Xd
		if d := r*r - p*p; d > 0 {
			x = -v*v/u.p.Xd + math.Sqrt(d)
		}
	}
	for range 100 {
		s := u.field(p, x, v, true)
		f := s.ifd - ifdMax
		if f == 0 {
			break
		}
		if f > 0 {
			hi = x
		} else {
			lo, loChecked = x, true
		}
		xn := math.NaN()
		if s.dIfd > 0 {
			xn = x - f/s.dIfd
		}
		if !(xn > lo && xn < hi) {
			if !loChecked {
				// The step leaves the rising branch: is there a root on it at all?
				// i_fd rises with q above lo, so none when f(lo) >= 0.
				if u.field(p, lo, v, false).ifd >= ifdMax {
					h.set(hintField, Bound{})
					return Bound{}
				}
				loChecked = true
			}
			if math.IsInf(hi, 1) {
				xn = x + 2*math.Max(1, x-lo)
			} else {
				xn = 0.5 * (lo + hi)
			}
		}
		// Newton converges quadratically near the root: after a step
		// of size d the error is about (f''/2f') d^2, under 1e-12 pu for
		// d <= 1e-6 on this smooth, gently curved function.
		if math.Abs(xn-x) <= 1e-6 {
			x = xn
			break
		}
		x = xn
	}
	b := some(x)
	h.set(hintField, b)
	return b
}

// stabLimits are the stability curves at one p and v.
type stabLimits struct {
	theo, prac Bound   // q_stability and the practical limit
	top        Bound   // when q_max itself is unstable: the top of the topmost stable interval
	err        error   // ErrSmallSignal: the avr basis' eigenvalue solver failed
	scanned    float64 // with a margin: the practical limit is the same for every top at or above this q (see practicalLimit)
}

// stabilityLimits returns the theoretical and the practical steady-state
// stability limits at active power p >= 0 and voltage v, below qTop (the
// upper bound q_max) and down to qBot (the armature lower bound), on the
// unit's basis, by the topmost-stable-interval rule (envelope.md, "Which
// stable interval, and the limit"). The machine is seen through Xe from
// the infinite bus with ra = 0 and unsaturated reactances (see stab).
//
// Manual basis: a point is unstable where K_s <= 0 or E_f <= 0. When
// qTop is stable the theoretical limit is the highest unstable q below
// it, bracketed: at the point where E_Q = V + jXq I is perpendicular to
// V_s (delta = 90 degrees), K_s = -2b <= 0, so that point is unstable;
// qTop bounds from above. When qTop is unstable the rule's scan finds the
// topmost stable interval (topInterval).
//
// Avr basis: the small-signal rule (avrStable), by the direct scan and
// bisection, or with fast true from the unit's table (stabTable).
//
// Practical limit: the rule of practicalLimit, from the theoretical limit
// up to the top of the same stable interval; with m = 0 it is the
// theoretical limit exactly (on the avr basis the point may lie beyond
// the peak of the manual power-angle curve, which the regulator holds).
//
// On a round rotor (Xq = Xd) the manual curves have closed forms, below.
func (u *Unit) stabilityLimits(p, v, qTop, qBot float64, h *Hint, fast bool, out *stabLimits) {
	if u.p.Basis == BasisAVR {
		u.avrLimits(p, v, qTop, qBot, fast, out)
		return
	}
	if u.roundStab {
		u.roundStability(p, v, qTop, qBot, out)
		return
	}
	g := func(q float64) float64 {
		s := u.stab(p, q, v)
		if s.degen {
			return -1
		}
		return math.Min(s.ks, s.ef)
	}
	gTop := g(qTop)
	if hint, ok := h.get(hintStab); ok && gTop > 0 {
		if q, slope, ok := warmRoot(g, hint, h.stabSlope, qTop); ok {
			theo := some(q)
			h.stabSlope = slope
			h.set(hintStab, theo)
			*out = stabLimits{theo: theo}
			out.prac, out.scanned = u.practicalLimit(p, v, q, qTop)
			return
		}
	}
	if gTop <= 0 {
		// q_max is unstable: the scan of the rule, from the top.
		iv := topInterval(func(q float64) (bool, error) { return g(q) > 0, nil }, qTop, qBot, scanStep, scanTol)
		h.set(hintStab, Bound{})
		*out = stabLimits{theo: iv.low, top: iv.top}
		if iv.low.OK {
			out.prac, out.scanned = u.practicalLimit(p, v, iv.low.V, iv.top.V)
		}
		return
	}
	var theo Bound
	lo, ok := u.perpendicular(p, v)
	if ok && lo > qTop {
		ok = false
	}
	var gLo float64
	if ok {
		gLo = g(lo)
		for i := 0; gLo > 0 && i < 8; i++ {
			// Rounding can leave K_s a hair above zero at the
			// perpendicular point itself; step just below it.
			lo -= 1e-9 * (1 + math.Abs(lo))
			gLo = g(lo)
		}
		ok = gLo <= 0
	}
	if !ok {
		// No perpendicular point at this p: search downward from qTop in
		// growing steps until the point is unstable.
		step := 0.05
		lo = qTop
		for lo > qTop-1e3 {
			lo -= step
			step *= 2
			if gLo = g(lo); gLo <= 0 {
				ok = true
				break
			}
		}
		if !ok {
			// Stable all the way down: no theoretical limit exists, and the
			// practical one is looked for from the floor of the rule's
			// downward scan (scanFloor below the armature lower bound, as
			// topInterval reports it), not from that depth.
			lo = math.Min(qBot-scanFloor, qTop)
		}
	}
	if ok {
		q, _ := brent(g, lo, qTop, gLo, gTop, stabTol)
		theo = some(q)
		lo = q
	}
	h.set(hintStab, theo)
	*out = stabLimits{theo: theo}
	out.prac, out.scanned = u.practicalLimit(p, v, lo, qTop)
}

// avrLimits is stabilityLimits on the avr basis.
func (u *Unit) avrLimits(p, v, qTop, qBot float64, fast bool, res *stabLimits) {
	var iv interval
	if fast && u.avrTab != nil {
		iv = u.fastInterval(p, v, qTop, qBot)
	} else {
		iv = u.avrInterval(p, v, qTop, qBot)
	}
	*res = stabLimits{theo: iv.low, top: iv.top, err: iv.err}
	if !iv.low.OK {
		return
	}
	if u.marginPU == 0 {
		res.prac = iv.low
		return
	}
	if iv.top.OK {
		qTop = iv.top.V
	}
	res.prac, res.scanned = u.practicalLimit(p, v, iv.low.V, qTop)
}

// peakExcess is the function whose sign the practical limit's rule
// tests, at active power p >= 0 and voltage v (newPeakExcess): at, the
// peak of P(delta) at the point's own E_f and V_s, less p and the margin
// m (pu). It is stab's a and b without the angle (see stab for the
// equations): with I_d the d-axis current, |E_Q| I_d = Re(I) Im(E_Q) -
// Im(I) Re(E_Q), so E_f = |E_Q| + (Xd - Xq) I_d needs no unit vector, and
// the terms that do not depend on q are formed once. (A value with a
// method rather than a closure, so that it stays on the stack.)
type peakExcess struct {
	v, xd, xq, xe, invXdS, kb, pm, iR, eqI, vsI float64
}

func (u *Unit) newPeakExcess(p, v float64) peakExcess {
	xd, xq, xe := u.p.Xd, u.p.Xq, u.p.Xe
	invXdS := 1 / (xd + xe)
	iR := p / v
	return peakExcess{v: v, xd: xd, xq: xq, xe: xe, invXdS: invXdS, kb: 0.5 * (1/(xq+xe) - invXdS),
		pm: p + u.marginPU, iR: iR, eqI: xq * iR, vsI: -xe * iR}
}

func (e *peakExcess) at(q float64) float64 {
	iI := -q / e.v
	eqR, vsR := e.v-e.xq*iI, e.v+e.xe*iI
	n := math.Sqrt(eqR*eqR + e.eqI*e.eqI)
	vs := math.Sqrt(vsR*vsR + e.vsI*e.vsI)
	if n == 0 || vs == 0 {
		return -e.pm
	}
	ef := n + (e.xd-e.xq)*(e.iR*e.eqI-iI*eqR)/n
	return peakPower(ef*vs*e.invXdS, e.kb*vs*vs) - e.pm
}

// practicalLimit applies the rule of the practical margin (envelope.md,
// "Practical margin") at active power p >= 0 and voltage v on the stable
// interval [qs, qTop] (qs = q_stability, qTop the interval's top): with
//
//	hf(q) = P_max(E_f(q), V_s(q)) - p - m,  m = margin_fraction x rated MW (pu),
//
// P_max the peak of P(delta) over delta in [0, pi] (peakExcess), the limit
// is qs when hf(qs) >= 0; else the scan looks at q_k = qs + k scanStep
// (k = 1, 2, ...; qTop in place of the first q_k at or above it) for the
// first q_k with hf(q_k) >= 0 and closes the bracket [q_(k-1), q_k] by
// Brent's method (a safeguarded bisection, to stabTol); no such q_k: the
// limit is absent (infeasible). The answer is a function of (p, v, qs,
// qTop) alone, on both bases and both paths; scanned is the highest q
// the rule looked at (the q_k that met it, qTop, or qs).
//
// A search for "a root of hf above qs" is not the rule: hf can cross zero
// more than once above qs. It is not monotone even on a round rotor on the
// manual basis (there hf = p/sin(delta) - p - m, and delta falls and
// rises again along the stable interval, see roundPractical), and on the
// avr basis q_stability may lie below the manual limit, where hf is
// V-shaped with its minimum -m at the manual limit (delta = 90 degrees on
// a round rotor) and positive far below it. Brent on [qs, qTop], or a warm
// secant from the previous sample's root, converged to whichever root was
// near, and the answer depended on the path and the hint history. No
// warm start is taken: one would have to check every grid point below its
// root, which is the scan itself.
//
// With no margin (m = 0, the default) it is qs itself: P_max - p touches
// zero there without crossing it (P_max >= P(delta) = p at every stable
// and unstable equilibrium alike), a double root no search finds to
// better than the square root of its tolerance.
func (u *Unit) practicalLimit(p, v, qs, qTop float64) (prac Bound, scanned float64) {
	if u.marginPU == 0 {
		// With m = 0 the practical limit is q_stability exactly
		// (envelope.md, "Practical margin"), on both bases.
		return some(qs), qs
	}
	e := u.newPeakExcess(p, v)
	return scanRule(e.at, qs, qTop)
}

// scanRule is the scan and bisection of practicalLimit on hf over
// [qs, qTop]. An interval longer than maxScan steps (or not finite) is
// no operating chart (nonsense input such as an infinite voltage): the
// limit is absent rather than scanned without end.
func scanRule(hf func(float64) float64, qs, qTop float64) (Bound, float64) {
	lo, fLo := qs, hf(qs)
	if fLo >= 0 {
		return some(qs), qs
	}
	if !((qTop-qs)/scanStep <= maxScan) {
		return Bound{}, qTop
	}
	for k := 1; lo < qTop; k++ {
		q := qs + float64(k)*scanStep
		if q >= qTop {
			q = qTop
		}
		f := hf(q)
		if f >= 0 {
			r, _ := brent(hf, lo, q, fLo, f, stabTol)
			return some(r), q
		}
		lo, fLo = q, f
	}
	return Bound{}, math.Max(qs, qTop)
}

// maxScan bounds the practical limit's scan: 10,000 steps of scanStep,
// 200 pu of reactive power, a hundred times any machine's chart.
const maxScan = 10_000

// PracticalLimit is the practical stability limit by the rule of the
// practical margin (envelope.md, "Practical margin"; see practicalLimit)
// at active power p and voltage v (pu), from a given q_stability qs up to
// the top qTop of its stable interval. Bounds and Evaluate apply it to
// their own q_stability and top (Stability and QMax), so
// PracticalLimit(p, v, b.Stability.V, b.QMax.V) is b.Practical on every
// path, to the root tolerance; it lets a check tell which q_stability a
// practical limit belongs to (the rule jumps where a root of
// P_max - p - m passes through q_stability).
func (u *Unit) PracticalLimit(p, v, qs, qTop float64) Bound {
	p = math.Abs(p)
	if u.roundStab && u.p.Basis != BasisAVR {
		x, xe := u.p.Xd, u.p.Xe
		v2 := v * v
		prac, _ := u.roundPractical(p, v2, x*xe, -v2*(x-xe), x*xe*p*p-v2*v2, qs, qTop)
		return prac
	}
	prac, _ := u.practicalLimit(p, v, qs, qTop)
	return prac
}

// perpendicular returns the q at which E_Q = V + jXq I and V_s = V - jXe I
// are perpendicular (total angle 90 degrees) on the underexcited side:
// Re(E_Q conj(V_s)) = 0 is
//
//	Xq Xe q^2 - v^2 (Xq - Xe) q + Xq Xe p^2 - v^4 = 0,
//
// the lower root. With Xq = Xd this is the textbook steady-state stability
// circle, centre (0, (v^2/2)(1/Xe - 1/Xd)), radius (v^2/2)(1/Xe + 1/Xd);
// with Xe = 0 it is the line q = -v^2/Xq.
//
// At p = 0 the lower root is q = -v^2/Xq, where E_Q itself is zero: its
// direction, and so E_f and K_s, jump there, and a bracket started on it
// closed on the jump instead of on the limit (a salient unit at exactly
// p = 0 gave -v^2/Xq where p = 0.01 MW gave -v^2/Xd). Just above that q,
// E_Q lies along V (delta = 0) and E_f = v + Xd q/v < 0: unstable like
// the perpendicular point, and on the continuous side of the jump, so
// the start moves there.
func (u *Unit) perpendicular(p, v float64) (float64, bool) {
	xq, xe := u.p.Xq, u.p.Xe
	v2 := v * v
	q, ok := quadLower(xq*xe, -v2*(xq-xe), xq*xe*p*p-v2*v2)
	if ok && p == 0 {
		q = math.Max(q, -v2/xq) + 1e-9*(1+math.Abs(q))
	}
	return q, ok
}

// roundStability is the closed form of both stability limits on the
// manual basis for a round rotor (Xq = Xd = X). The total angle delta
// between E and V_s satisfies Im(E conj V_s) = p (X + Xe) and
//
//	Re(E conj V_s) = v^2 + (X - Xe) q - X Xe (q^2 + p^2)/v^2,
//
// and P(delta) = P_max sin(delta) with P_max = E_f V_s/(X + Xe). The
// point is stable where Re > 0 (delta below 90 degrees): between the two
// roots of the quadratic (see perpendicular), the theoretical limit the
// lower one; when the upper root lies below qTop, q_max moves down to it
// (the topmost stable interval). The practical limit is roundPractical.
func (u *Unit) roundStability(p, v, qTop, qBot float64, res *stabLimits) {
	*res = stabLimits{}
	x, xe := u.p.Xd, u.p.Xe
	v2 := v * v
	a, b, c := x*xe, -v2*(x-xe), x*xe*p*p-v2*v2
	qs, ok := quadLower(a, b, c)
	if !ok {
		// Re(E conj V_s) < 0 for every q: the angle exceeds 90 degrees
		// whatever the excitation, so the unit cannot carry p through Xe.
		res.theo = some(qTop)
		return
	}
	if qs >= qTop {
		res.theo = some(qTop)
		return
	}
	if a > 0 {
		if qu := (-b + math.Sqrt(math.Max(b*b-4*a*c, 0))) / (2 * a); qu < qTop {
			if qu <= qBot {
				res.theo = some(qTop)
				return
			}
			res.top, qTop = some(qu), qu
		}
	}
	res.theo = some(qs)
	res.prac, res.scanned = u.roundPractical(p, v2, a, b, c, qs, qTop)
}

// roundPractical is the rule of practicalLimit in closed form for a
// round rotor on the manual basis, with a, b, c the coefficients of
// roundStability's quadratic at p >= 0 and v2 = v^2, on the stable
// interval [qs, qTop] between its roots. With b = 0 in P(delta),
// P_max = E_f V_s/(X + Xe) and p = P_max sin(delta), so
//
//	hf = P_max - p - m = p/sin(delta) - p - m >= 0  <=>  sin(delta) <= p/(p + m),
//
// and, delta lying below 90 degrees on the stable interval (Re > 0, with
// Im = p (X + Xe) fixed), that is Re >= (X + Xe) sqrt(m^2 + 2pm): the same
// concave quadratic with its constant term raised by
// v^2 (X + Xe) sqrt(m^2 + 2pm), between its roots r1 <= r2 (r2 = +inf
// when Xe = 0 makes it linear). hf is not monotone (it rises from -m at
// qs to the vertex of Re and falls back to -m at its upper root), but it
// is >= 0 exactly on [r1, r2]: the rule's first grid point that meets it
// is the first q_k at or above r1 when that q_k (or qTop in its place)
// is still <= r2, and the bracket below it holds r1 alone, so the answer
// is r1. A region [r1, r2] that falls between two grid points (narrower
// than scanStep, near the p at which the margin can no longer be met) is
// skipped by the scan, and so by this too: infeasible. scanned is
// practicalLimit's: the answer is the same for any top at or above it.
func (u *Unit) roundPractical(p, v2, a, b, c, qs, qTop float64) (prac Bound, scanned float64) {
	m := u.marginPU
	if m == 0 {
		return some(qs), qs
	}
	x, xe := u.p.Xd, u.p.Xe
	c += v2 * (x + xe) * math.Sqrt(m*m+2*p*m)
	// r1 and the band's width w = r2 - r1, the roots written to avoid
	// cancellation as in quadLower (which would take the square root again).
	var r1, w float64
	if a == 0 {
		if b == 0 {
			return Bound{}, qTop
		}
		r1, w = -c/b, math.Inf(1)
	} else {
		disc := b*b - 4*a*c
		if disc < 0 {
			return Bound{}, qTop
		}
		sq := math.Sqrt(disc)
		switch {
		case b > 0:
			r1 = (-b - sq) / (2 * a)
		case sq != b:
			r1 = 2 * c / (sq - b)
		}
		w = sq / a
	}
	if r1 > qTop {
		return Bound{}, qTop
	}
	if r1 <= qs {
		// At q_stability hf = -m < 0, so r1 > qs but for rounding (or for
		// a qs given to PracticalLimit off the limit): the rule's first
		// point, qs, decides.
		if qs <= r1+w {
			return some(qs), qs
		}
		return Bound{}, qTop
	}
	if w >= scanStep {
		// The first of the scan's points at or above r1, or qTop in its
		// place, lies in the band, whatever the top above r1.
		return some(r1), r1
	}
	// A band narrower than the step: is one of the scan's points in it?
	q := qs + math.Ceil((r1-qs)/scanStep)*scanStep
	if q > qTop {
		q = qTop
	}
	if q > r1+w {
		return Bound{}, qTop
	}
	return some(r1), q
}
