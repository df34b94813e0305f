package limits

import "math"

// Evaluate places one operating point against the unit's envelope at the
// point's own voltage, frequency and coolant. h carries the previous
// solution of the same unit (see Hint) and may be nil. Evaluate does not
// allocate. The quantities that describe the point rather than its
// distance to the envelope (LoadAngle, CriticalClearingTime) are methods
// of their own, so that the per-sample path does not pay for them.
//
// Margins, all ratios, positive inside the envelope:
//
//	armature         1 - i/i_max
//	field            1 - i_fd/i_fd_max (the measured field current when the point has one, else the model; see fieldCurrent)
//	stability        (q - q_practical) / 1 pu; where q_max moved down to the top of the
//	                 stable interval (StabilityTop), the smaller of that and (top - q) / 1 pu
//	end_region       (q - q_end) / 1 pu (only with an end-region curve)
//	uel              (q - q_uel) / 1 pu (only with a UEL curve that has a value at p)
//	prime_mover      min(p_max - p, p - p_min) / p_rated, the prime mover's p_max and p_min
//	volts_per_hertz  1 - (v/f)/1.05
//
// The binding limit is the nearest chart limit by distance (see bind).
//
// On the avr basis, Evaluate with a hint is the per-sample path and reads
// the stability limit from the unit's table (within 0.002 pu of the
// direct computation, see stabTable); with a nil hint it is the direct
// computation (avrInterval, tens of microseconds).
func (u *Unit) Evaluate(pt Point, h *Hint) Result {
	return u.evaluate(pt, h, true, h != nil && u.avrTab != nil)
}

// EvaluateSample is Evaluate for the per-sample path of a service. Its
// margins, binding limit, feasibility, lower bound and practical
// stability limit are Evaluate's; but where nothing else depends on
// them, it leaves the field-limit curve (and so q_max, its limit and the
// binding limit) unsolved and sets QMaxPending. Complete solves them
// when someone reads them, which is far less often than samples arrive.
func (u *Unit) EvaluateSample(pt Point, h *Hint) Result {
	return u.evaluate(pt, h, false, h != nil && u.avrTab != nil)
}

// Complete solves what EvaluateSample left pending in r, the result of
// point pt; after it r is Evaluate's result, to the root tolerance (on
// the avr basis the result of Evaluate with a hint: both read the
// stability limit from the unit's table). It does nothing when nothing
// is pending.
func (u *Unit) Complete(r *Result, pt Point) {
	if !r.QMaxPending {
		return
	}
	if r.fast {
		// The avr basis' table answer depends on q_max only through
		// which checks it needs: the evaluation is done again, as
		// Evaluate with a hint does it.
		*r = u.evaluate(pt, nil, true, true)
		return
	}
	r.Field = u.fieldLimit(pt.P, pt.V, r.IfdMax, nil)
	r.upperBound()
	r.QMaxPending = false
	u.bind(r, pt)
}

func (u *Unit) evaluate(pt Point, h *Hint, full, fast bool) Result {
	p, q, v := pt.P, pt.Q, pt.V
	f := pt.F
	if f == 0 {
		f = 1
	}
	var r Result
	armF, fieldF := 1.0, 1.0
	if pt.HasCoolant && u.hasCoolant {
		var inside bool
		if h != nil && h.has&hintCoolant != 0 && h.coolant == pt.Coolant {
			armF, fieldF, inside = h.armF, h.fieldF, h.coolInside
		} else {
			armF, fieldF, inside = u.CoolantFactors(pt.Coolant)
			if h != nil {
				h.coolant, h.armF, h.fieldF, h.coolInside = pt.Coolant, armF, fieldF, inside
				h.has |= hintCoolant
			}
		}
		r.CoolantOutside = !inside
	}
	r.IMax, r.IfdMax = armF, u.ifdRated*fieldF
	r.fast = fast
	r.Bounds, r.QMaxPending = u.bounds(p, v, armF, fieldF, h, full, r.fast)

	fs := u.field(p, q, v, false)
	r.IfdModel, r.Ef = fs.ifd, fs.ef
	r.I = math.Sqrt(p*p+q*q) / v

	r.PMax = Bound{V: u.p.PMax, OK: true}
	if a := v*r.IMax*v*r.IMax - q*q; a >= 0 {
		r.PMax.V = math.Min(r.PMax.V, math.Sqrt(a))
	} else {
		r.PMax = Bound{}
	}

	r.Margins[LimitArmature] = some(1 - r.I/r.IMax)
	r.FieldCurrent = fieldCurrent(&pt, r.IfdModel)
	r.Margins[LimitField] = some(1 - r.FieldCurrent/r.IfdMax)
	if r.Practical.OK {
		m := q - r.Practical.V
		if r.StabilityTop.OK {
			// Above the topmost stable interval the point is unstable too.
			m = math.Min(m, r.StabilityTop.V-q)
		}
		r.Margins[LimitStability] = some(m)
	}
	if r.EndRegion.OK {
		r.Margins[LimitEndRegion] = some(q - r.EndRegion.V)
	}
	if r.UEL.OK {
		r.Margins[LimitUEL] = some(q - r.UEL.V)
	}
	r.Margins[LimitPrimeMover] = some(u.primeMoverDistance(p) * u.invPRated)
	r.VPerHz = v / f
	r.Margins[LimitVoltsPerHertz] = some(1 - r.VPerHz*(1/VoltsPerHertzLimit))
	r.Zone = VoltageFrequencyZone(v, f)

	// A pending q_max exists and lies above q_min: deferredBounds checked both.
	r.Feasible = r.QMaxPending || r.QMax.OK && r.QMin.OK && r.QMin.V <= r.QMax.V
	switch {
	case !r.QMax.OK:
		r.Infeasible = r.QMaxLimit
	case !r.QMin.OK:
		r.Infeasible = r.QMinLimit
	case !r.Feasible:
		r.Infeasible = r.QMinLimit
	}
	if !r.QMaxPending {
		u.bind(&r, pt)
	}
	return r
}

// fieldCurrent returns the field current the field margin is taken at,
// pu of IFag: the measured one when the point has it, else the model's;
// the larger of the two when the measurement is doubtful (a QUESTIONABLE
// sample) or disagrees with the model by more than pt.IfdMismatch of the
// model's (envelope.md, "Margins"): a sensor fault must not hide a
// heating winding.
func fieldCurrent(pt *Point, model float64) float64 {
	if !pt.IfdMeasured {
		return model
	}
	ifd := pt.Ifd
	doubt := pt.IfdDoubtful || pt.IfdMismatch > 0 && math.Abs(ifd-model) > pt.IfdMismatch*model
	if doubt && model > ifd {
		ifd = model
	}
	return ifd
}

// primeMoverDistance returns min(p_max - p, p - p_min) in pu of rated
// MVA: negative above p_max, below p_min and in reverse power
// (envelope.md, "Active power bound").
func (u *Unit) primeMoverDistance(p float64) float64 {
	return math.Min(u.p.PMax-p, p-u.p.PMin)
}

// bind sets r.Binding: the capability-chart limit nearest the point, by
// distance in pu of rated MVA (envelope.md, "Binding limit"):
//
//	armature     v i_max - sqrt(p^2 + q^2)
//	field        q_field - q
//	stability    q - q_practical (or top - q, see Evaluate)
//	end region   q - q_end
//	uel          q - q_uel
//	prime mover  min(p_max - p, p - p_min)
//
// Volts per hertz and the zones never bind. An infeasible point is bound
// by the limit whose bound is missing. It needs the field curve solved.
func (u *Unit) bind(r *Result, pt Point) {
	if !r.Feasible {
		r.Binding = r.Infeasible
		return
	}
	p, q := pt.P, pt.Q
	best := math.Inf(1)
	r.Binding = NoLimit
	try := func(l Limit, d float64) {
		if d < best {
			best, r.Binding = d, l
		}
	}
	try(LimitArmature, pt.V*r.IMax-math.Sqrt(p*p+q*q))
	if r.Field.OK {
		try(LimitField, r.Field.V-q)
	}
	if m := r.Margins[LimitStability]; m.OK {
		try(LimitStability, m.V) // q - q_practical, or top - q where q_max moved to the stable interval's top
	}
	if r.EndRegion.OK {
		try(LimitEndRegion, q-r.EndRegion.V)
	}
	if r.UEL.OK {
		try(LimitUEL, q-r.UEL.V)
	}
	try(LimitPrimeMover, u.primeMoverDistance(p))
}

// Headroom returns the reactive headroom at q against the result's
// bounds, in pu: up = q_max - q, down = q - q_min.
func (r *Result) Headroom(q float64) (up, down Bound) {
	if r.QMax.OK {
		up = some(r.QMax.V - q)
	}
	if r.QMin.OK {
		down = some(q - r.QMin.V)
	}
	return up, down
}

// EnvelopePoint is the envelope at one active power.
type EnvelopePoint struct {
	P float64 // pu
	Bounds
}

// Envelope returns the limit curves at n active powers spaced evenly
// from 0 to the active-power bound, min(prime-mover p_max, v i_max), at
// voltage v (pu) and, when hasCoolant, coolant value c. n < 2 is taken as 2.
func (u *Unit) Envelope(v, c float64, hasCoolant bool, n int) []EnvelopePoint {
	if n < 2 {
		n = 2
	}
	armF, fieldF := 1.0, 1.0
	if hasCoolant {
		armF, fieldF, _ = u.CoolantFactors(c)
	}
	pTop := math.Min(u.p.PMax, v*armF)
	pts := make([]EnvelopePoint, n)
	var h Hint
	for i := range pts {
		p := pTop * float64(i) / float64(n-1)
		pts[i] = EnvelopePoint{P: p, Bounds: u.Bounds(p, v, armF, fieldF, &h)}
	}
	return pts
}
