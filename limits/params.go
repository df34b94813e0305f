package limits

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sort"

	"gonum.org/v1/gonum/interp"
)

// Rotor is the construction of the rotor, which decides whether the
// machine has one synchronous reactance or two.
type Rotor uint8

const (
	// Round is a cylindrical (non-salient) rotor: turbine generators.
	Round Rotor = iota
	// Salient is a salient-pole rotor: hydro and low-speed machines.
	Salient
)

// String returns the fleet-file spelling of the rotor kind.
func (r Rotor) String() string {
	switch r {
	case Round:
		return "round"
	case Salient:
		return "salient"
	}
	return fmt.Sprintf("Rotor(%d)", uint8(r))
}

// Params are the steady-state parameters of one generator, all in per
// unit on the machine's own base (S_base = rated MVA, V_base = rated
// line-line kV) and field current in per unit of IFag. The fleet loader
// converts engineering units and fills defaults; New checks consistency.
type Params struct {
	Rotor Rotor

	Xd float64 // unsaturated direct-axis synchronous reactance, pu
	Xq float64 // unsaturated quadrature-axis synchronous reactance, pu (= Xd on a round rotor unless given)
	Xl float64 // armature leakage reactance, pu
	Xp float64 // Potier reactance, pu (= Xl unless given)
	Ra float64 // armature resistance, pu

	XdTransient float64 // direct-axis transient reactance Xd', pu; 0 when not known
	InertiaHS   float64 // inertia constant H on machine base, s; 0 when not known

	S10, S12 float64 // open-circuit saturation factors S(1.0), S(1.2); both 0 for no saturation

	// IfdRated is the continuous rated field current in pu of IFag.
	// 0 means "take the model's field current at the rated point".
	IfdRated float64

	PowerFactor float64 // rated power factor, (0, 1]
	FrequencyHz float64 // rated frequency, Hz

	PMax, PMin float64 // prime-mover active-power bounds, pu of rated MVA

	Xe             float64 // external reactance to the infinite bus (step-up plus system), pu on machine base
	MarginFraction float64 // practical stability margin as a fraction of rated MW

	// The avr stability basis (envelope.md, "The linearized model").
	Basis         Basis       // which stability limit the unit is held to
	ZetaMin       float64     // lowest damping ratio of an electromechanical mode, [0, 1)
	Td0TransientS float64     // open-circuit d-axis transient time constant T'd0, s; 0 when not known
	DampingPU     float64     // mechanical damping D, pu torque per pu speed
	Exciter       *Exciter    // the regulator; nil when not given
	Stabilizer    *Stabilizer // the power system stabilizer; nil when none

	UEL *UEL // the underexcitation limiter curve; nil when none

	EndRegion *EndRegion // optional stator end-region curve
	Coolant   *Coolant   // optional coolant capability table
}

// EndRegion is a maker's stator end-region heating curve: the lowest
// admissible reactive power at each active power, in pu, at rated voltage.
type EndRegion struct {
	P, Q            []float64 // strictly increasing P; at least two points
	VoltageExponent float64   // the curve scales with v^k
}

// Coolant is a capability table against a coolant quantity (hydrogen
// pressure, cold-gas or ambient temperature, in the fleet file's unit).
// Each factor multiplies the continuous rating of its winding.
type Coolant struct {
	At       []float64 // strictly increasing coolant values; at least two points
	Armature []float64 // armature current factor at each value
	Field    []float64 // field current factor at each value
}

// A ParamError names the parameter that is wrong and why.
type ParamError struct {
	Field  string // fleet-file spelling, e.g. "machine.xq"
	Reason string
}

func (e *ParamError) Error() string { return e.Field + ": " + e.Reason }

// Unit is a generator ready to be evaluated: its parameters checked, its
// derived constants computed once. A Unit is immutable and safe for
// concurrent use.
type Unit struct {
	p Params

	satA, satB   float64 // saturation S(E)·E = B (E - A)^2 for E > A
	ifdRated     float64 // rated field current, pu IFag (nameplate or model)
	ifdModel     float64 // model field current at the rated point, pu IFag
	pRated       float64 // rated active power, pu = power factor
	invPRated    float64
	marginPU     float64 // practical stability margin m, pu
	roundStab    bool    // Xq == Xd: closed-form stability bounds apply
	endRegion    interp.PiecewiseLinear
	hasEnd       bool
	hasCoolant   bool
	hasTransient bool

	// The avr stability basis.
	avrTab  *stabTable // q_stability over p and v for the per-sample path; nil on the manual basis
	avrChar charParts  // the fixed parts of the characteristic polynomial (avr basis)
}

// New checks p and prepares a Unit. Every inconsistency found is
// reported: the error is a *ParamError naming the parameter in the fleet
// file's spelling, or several joined with errors.Join (see ParamErrors).
// The Unit keeps copies of the curves and tables it is given.
func New(p Params) (*Unit, error) { return newUnit(p, nil) }

// newUnit is New, with the avr table shared through ts (see NewShared).
func newUnit(p Params, ts *Tables) (*Unit, error) {
	var errs []error
	bad := func(field, format string, args ...any) {
		errs = append(errs, &ParamError{Field: field, Reason: fmt.Sprintf(format, args...)})
	}
	pos := func(x float64) bool { return x > 0 && !math.IsInf(x, 0) }
	fin := func(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
	// The machine's reactances.
	switch {
	case p.Rotor != Round && p.Rotor != Salient:
		bad("machine.rotor", "must be round or salient")
	case !pos(p.Xd):
		bad("machine.xd", "must be a positive finite reactance in pu, got %v", p.Xd)
	case !pos(p.Xq):
		bad("machine.xq", "must be a positive finite reactance in pu, got %v", p.Xq)
	case p.Xq > p.Xd:
		bad("machine.xq", "xq (%v) must not exceed xd (%v)", p.Xq, p.Xd)
	case p.Rotor == Salient && p.Xq >= p.Xd:
		bad("machine.xq", "a salient-pole rotor needs xq < xd, got xq %v, xd %v", p.Xq, p.Xd)
	}
	// Below xd: checked against a valid xd only, so that one wrong xd is one error.
	xdOK := pos(p.Xd)
	if !pos(p.Xl) || xdOK && p.Xl >= p.Xd {
		bad("machine.xl", "must be a positive reactance below xd (%v pu), got %v", p.Xd, p.Xl)
	}
	if !pos(p.Xp) || xdOK && p.Xp >= p.Xd {
		bad("machine.xp", "must be a positive reactance below xd (%v pu), got %v", p.Xd, p.Xp)
	}
	if !fin(p.Ra) || p.Ra < 0 || p.Ra > 0.1 {
		bad("machine.ra", "must be in [0, 0.1] pu, got %v", p.Ra)
	}
	if !fin(p.XdTransient) || p.XdTransient < 0 || xdOK && p.XdTransient >= p.Xd {
		bad("machine.xd_transient", "must be in (0, xd) pu (xd %v) when given, got %v", p.Xd, p.XdTransient)
	}
	if !fin(p.InertiaHS) || p.InertiaHS < 0 {
		bad("machine.inertia_h_s", "must be a positive time in s when given, got %v", p.InertiaHS)
	}
	// Saturation: the quadratic form needs 1.2 S(1.2) > S(1.0), else its
	// A >= 1 puts saturation at or below zero voltage (envelope.md, "Fleet-file findings").
	switch {
	case !fin(p.S10) || !fin(p.S12) || p.S10 < 0 || p.S12 < 0:
		bad("machine.saturation", "s10 and s12 must be finite and non-negative, got %v and %v", p.S10, p.S12)
	case (p.S10 == 0) != (p.S12 == 0):
		bad("machine.saturation", "give both s10 and s12 positive, or neither, got %v and %v", p.S10, p.S12)
	case p.S10 > 0 && p.S12 <= 1.2*p.S10:
		bad("machine.saturation.s12", "s12 (%v) must exceed 1.2 x s10 (%v): saturation grows faster than voltage; a smaller s12 puts the knee of the curve at zero voltage", p.S12, 1.2*p.S10)
	}
	if !fin(p.IfdRated) || p.IfdRated < 0 {
		bad("field.rated_a", "must be a positive current when given, got %v pu of IFag", p.IfdRated)
	}
	if !(p.PowerFactor > 0 && p.PowerFactor <= 1) {
		bad("rating.power_factor", "must be in (0, 1], got %v", p.PowerFactor)
	}
	if !pos(p.FrequencyHz) {
		bad("rating.frequency_hz", "must be a positive frequency, got %v", p.FrequencyHz)
	}
	// The prime mover, in pu of rated MVA.
	switch {
	case !pos(p.PMax):
		bad("prime_mover.p_max_mw", "must be positive, got %.4g pu of rated MVA", p.PMax)
	case p.PMax > 1:
		bad("prime_mover.p_max_mw", "must not exceed the rated MVA (the prime mover cannot drive more than the generator's rating); got %.4g pu of it", p.PMax)
	case !fin(p.PMin) || p.PMin < 0 || p.PMin >= p.PMax:
		bad("prime_mover.p_min_mw", "must be at least 0 and below p_max_mw; got %.4g against %.4g pu of rated MVA", p.PMin, p.PMax)
	}
	if !fin(p.Xe) || p.Xe < 0 {
		bad("grid.x_external_pu", "must be a non-negative reactance in pu, got %v", p.Xe)
	}
	// The stability basis.
	if !fin(p.MarginFraction) || p.MarginFraction < 0 || p.MarginFraction >= 1 {
		bad("stability.margin_fraction", "must be in [0, 1), got %v", p.MarginFraction)
	}
	// The avr basis' own parameters: checkAVR, reported with the others.
	if err := checkAVR(&p); err != nil {
		errs = append(errs, err)
	}
	if c := p.UEL; c != nil {
		checkUEL(c, bad)
	}
	if e := p.EndRegion; e != nil {
		if len(e.P) < 2 || len(e.P) != len(e.Q) {
			bad("end_region.points", "need at least two points with p_mw and q_mvar, got %d", len(e.P))
		} else if i := badCurve(e.P, e.Q); i > 0 {
			bad(fmt.Sprintf("end_region.points[%d]", i), "point %d: p_mw must be finite and above the previous point's, q_mvar finite", i)
		}
		if !fin(e.VoltageExponent) || math.Abs(e.VoltageExponent) > 10 {
			bad("end_region.voltage_exponent", "must be in [-10, 10], got %v", e.VoltageExponent)
		}
	}
	if c := p.Coolant; c != nil {
		if len(c.At) < 2 || len(c.At) != len(c.Armature) || len(c.At) != len(c.Field) {
			bad("coolant.points", "need at least two points, each with at, armature and field; got %d", len(c.At))
		} else {
			for i := range c.At {
				if !fin(c.At[i]) || i > 0 && !(c.At[i] > c.At[i-1]) {
					bad(fmt.Sprintf("coolant.points[%d].at", i+1), "point %d: at must be finite and above the previous point's (strictly increasing)", i+1)
					break
				}
			}
			for i := range c.At {
				if !(c.Armature[i] > 0 && c.Armature[i] <= 2) || !(c.Field[i] > 0 && c.Field[i] <= 2) {
					bad(fmt.Sprintf("coolant.points[%d]", i+1), "point %d: factors must be in (0, 2], got armature %v, field %v", i+1, c.Armature[i], c.Field[i])
					break
				}
			}
		}
	}
	if len(errs) > 0 {
		if len(errs) == 1 {
			return nil, errs[0]
		}
		return nil, errors.Join(errs...)
	}

	u := &Unit{p: p, pRated: p.PowerFactor, invPRated: 1 / p.PowerFactor, marginPU: p.MarginFraction * p.PowerFactor}
	u.roundStab = p.Xq == p.Xd
	u.hasTransient = p.XdTransient > 0 && p.InertiaHS > 0
	if p.S10 > 0 {
		u.satA, u.satB = SaturationAB(p.S10, p.S12)
	}
	// Copies, so that the caller's values may change without changing the unit.
	if e := p.EndRegion; e != nil {
		u.p.EndRegion = &EndRegion{P: slices.Clone(e.P), Q: slices.Clone(e.Q), VoltageExponent: e.VoltageExponent}
		if err := u.endRegion.Fit(u.p.EndRegion.P, u.p.EndRegion.Q); err != nil {
			return nil, &ParamError{Field: "end_region.points", Reason: err.Error()}
		}
		u.hasEnd = true
	}
	if c := p.Coolant; c != nil {
		u.p.Coolant = &Coolant{At: slices.Clone(c.At), Armature: slices.Clone(c.Armature), Field: slices.Clone(c.Field)}
		u.hasCoolant = true
	}
	if c := p.UEL; c != nil {
		cc := *c
		cc.P, cc.Q = slices.Clone(c.P), slices.Clone(c.Q)
		u.p.UEL = &cc
	}
	// The exciter and stabilizer are copied by prepareAVR.
	if err := u.prepareAVR(ts); err != nil {
		return nil, err
	}
	u.ifdModel = u.FieldCurrent(p.PowerFactor, math.Sqrt(1-p.PowerFactor*p.PowerFactor), 1)
	u.ifdRated = p.IfdRated
	if u.ifdRated == 0 {
		u.ifdRated = u.ifdModel
	}
	return u, nil
}

// ParamErrors returns the *ParamError values err holds: err itself, or
// the errors joined in it by New.
func ParamErrors(err error) []*ParamError {
	var out []*ParamError
	var walk func(error)
	walk = func(e error) {
		if pe, ok := e.(*ParamError); ok {
			out = append(out, pe)
			return
		}
		if j, ok := e.(interface{ Unwrap() []error }); ok {
			for _, x := range j.Unwrap() {
				walk(x)
			}
		}
	}
	walk(err)
	return out
}

// badCurve returns the 1-based index of the first point of a curve whose
// abscissa is not finite and strictly above the previous one or whose
// ordinate is not finite; 0 when all are good.
func badCurve(x, y []float64) int {
	for i := range x {
		if math.IsNaN(x[i]) || math.IsInf(x[i], 0) || math.IsNaN(y[i]) || math.IsInf(y[i], 0) || i > 0 && !(x[i] > x[i-1]) {
			return i + 1
		}
	}
	return 0
}

// checkUEL checks an underexcitation limiter curve (coordination.md, "Inputs").
func checkUEL(c *UEL, bad func(field, format string, args ...any)) {
	fin := func(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
	switch c.Shape {
	case UELCircle:
		if !fin(c.CenterP) || !fin(c.CenterQ) {
			bad("excitation.uel", "the centre must be finite, got (%v, %v) pu", c.CenterP, c.CenterQ)
		}
		if !(c.Radius > 0) || !fin(c.Radius) {
			bad("excitation.uel.radius_mvar", "must be positive, got %v pu", c.Radius)
		}
		if !fin(c.K) || math.Abs(c.K) > 10 {
			bad("excitation.uel.voltage_exponent", "must be in [-10, 10], got %v", c.K)
		}
	case UELPoints:
		if len(c.P) < 2 || len(c.P) != len(c.Q) {
			bad("excitation.uel.points", "need at least two points with p_mw and q_mvar, got %d", len(c.P))
		} else if i := badCurve(c.P, c.Q); i > 0 {
			bad(fmt.Sprintf("excitation.uel.points[%d]", i), "point %d: p_mw must be finite and above the previous point's, q_mvar finite", i)
		}
		if !fin(c.K1) || math.Abs(c.K1) > 10 {
			bad("excitation.uel.voltage_exponent_p", "must be in [-10, 10], got %v", c.K1)
		}
		if !fin(c.K2) || math.Abs(c.K2) > 10 {
			bad("excitation.uel.voltage_exponent_q", "must be in [-10, 10], got %v", c.K2)
		}
	default:
		bad("excitation.uel.shape", "must be circle or points")
	}
}

// checkAVR checks the parameters of the avr stability basis (envelope.md,
// "The linearized model for the avr basis"): the ones the small-signal
// model needs, in the fleet file's spelling. It is separate from the
// steady-state checks of New.
func checkAVR(p *Params) error {
	bad := func(field, format string, args ...any) error {
		return &ParamError{Field: field, Reason: fmt.Sprintf(format, args...)}
	}
	fin := func(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
	posT := func(x float64) bool { return x > 0 && fin(x) }
	switch {
	case p.Basis != BasisManual && p.Basis != BasisAVR:
		return bad("stability.basis", "must be manual or avr")
	case !fin(p.ZetaMin) || p.ZetaMin < 0 || p.ZetaMin >= 1:
		return bad("stability.zeta_min", "must be in [0, 1), got %v", p.ZetaMin)
	case !fin(p.Td0TransientS) || p.Td0TransientS < 0:
		return bad("machine.td0_transient_s", "must be a positive time in s when given, got %v", p.Td0TransientS)
	case !fin(p.DampingPU) || p.DampingPU < 0:
		return bad("machine.damping_pu", "must be a non-negative damping in pu torque per pu speed, got %v", p.DampingPU)
	}
	if e := p.Exciter; e != nil {
		switch {
		case !fin(e.KA) || e.KA < 0:
			return bad("excitation.k_a", "must be a non-negative gain, got %v", e.KA)
		case !posT(e.TAS):
			return bad("excitation.t_a_s", "must be a positive time in s, got %v", e.TAS)
		case !fin(e.TRS) || e.TRS < 0:
			return bad("excitation.t_r_s", "must be a non-negative time in s, got %v", e.TRS)
		case !fin(e.EfdMin):
			return bad("excitation.efd_min_pu", "must be a finite field voltage in pu, got %v", e.EfdMin)
		case !fin(e.EfdMax) || e.EfdMax < 0 || (e.EfdMax > 0 && e.EfdMax <= e.EfdMin):
			return bad("excitation.efd_max_pu", "must be above efd_min_pu (%v) when given, got %v", e.EfdMin, e.EfdMax)
		}
	}
	if s := p.Stabilizer; s != nil {
		switch {
		case !fin(s.K) || s.K < 0:
			return bad("stabilizer.k", "must be a non-negative gain, got %v", s.K)
		case !posT(s.TWS):
			return bad("stabilizer.t_w_s", "must be a positive washout time in s, got %v", s.TWS)
		case !fin(s.T1S) || s.T1S < 0:
			return bad("stabilizer.t1_s", "must be a non-negative time in s, got %v", s.T1S)
		case !posT(s.T2S):
			return bad("stabilizer.t2_s", "must be a positive lag time in s (a lead-lag needs t2 > 0), got %v", s.T2S)
		case !fin(s.T3S) || s.T3S < 0:
			return bad("stabilizer.t3_s", "must be a non-negative time in s, got %v", s.T3S)
		case !posT(s.T4S):
			return bad("stabilizer.t4_s", "must be a positive lag time in s (a lead-lag needs t4 > 0), got %v", s.T4S)
		}
	}
	if p.Basis != BasisAVR {
		return nil
	}
	// What the linearized model needs.
	switch {
	case p.Exciter == nil:
		return bad("excitation", "the avr stability basis needs the exciter (k_a, t_a_s)")
	case p.Td0TransientS == 0:
		return bad("machine.td0_transient_s", "the avr stability basis needs T'd0")
	case p.InertiaHS == 0:
		return bad("machine.inertia_h_s", "the avr stability basis needs the inertia constant H")
	case p.XdTransient == 0:
		return bad("machine.xd_transient", "the avr stability basis needs X'd")
	}
	return nil
}

// DefaultBasis is the stability basis of a unit whose fleet file does
// not name one (envelope.md, "Stability basis"): avr when the exciter is
// given, else manual.
func (p *Params) DefaultBasis() Basis {
	if p.Exciter != nil {
		return BasisAVR
	}
	return BasisManual
}

// prepareAVR checks the avr basis' parameters and, on that basis, builds
// the per-sample table of the stability limit (stabTable), copying the
// exciter and stabilizer so that the caller's may change. The table
// comes from ts when a unit of the same table parameters built it.
func (u *Unit) prepareAVR(ts *Tables) error {
	if err := checkAVR(&u.p); err != nil {
		return err
	}
	if e := u.p.Exciter; e != nil {
		c := *e
		u.p.Exciter = &c
	}
	if s := u.p.Stabilizer; s != nil {
		c := *s
		u.p.Stabilizer = &c
	}
	if u.p.Basis != BasisAVR {
		return nil
	}
	u.avrChar = u.charParts()
	t, err := ts.table(u, u.buildStabTable)
	if err != nil {
		return &ParamError{Field: "stability.basis", Reason: "the small-signal model could not be solved while preparing the unit: " + err.Error()}
	}
	u.avrTab = t
	return nil
}

// Params returns the parameters the unit was built from.
func (u *Unit) Params() Params { return u.p }

// RatedFieldCurrent returns the continuous rated field current in pu of
// IFag: the nameplate value when one was given, else the model's.
func (u *Unit) RatedFieldCurrent() float64 { return u.ifdRated }

// ModelRatedFieldCurrent returns the model's field current at the rated
// point (p = power factor, q = sqrt(1 - pf^2), v = 1), in pu of IFag.
func (u *Unit) ModelRatedFieldCurrent() float64 { return u.ifdModel }

// RatedP returns rated active power in pu of rated MVA (the power factor).
func (u *Unit) RatedP() float64 { return u.pRated }

// SaturationAB returns the constants of the quadratic open-circuit
// saturation function S(E) = B (E - A)^2 / E for E > A, from the two
// saturation factors S(1.0) and S(1.2):
//
//	r = sqrt(1.2 S(1.2) / S(1.0)), A = (r - 1.2)/(r - 1), B = S(1.0)/(1 - A)^2.
//
// Source: IEEE Std 1110 and IEEE Std 421.5 (from memory). It needs
// 0 < s10 and 1.2 s12 > s10.
func SaturationAB(s10, s12 float64) (a, b float64) {
	r := math.Sqrt(1.2 * s12 / s10)
	a = (r - 1.2) / (r - 1)
	b = s10 / ((1 - a) * (1 - a))
	return a, b
}

// Saturation returns S(E), the per-unit saturation factor at air-gap
// voltage e (pu), for this unit's saturation constants; 0 without saturation.
func (u *Unit) Saturation(e float64) float64 {
	if u.satB == 0 || e <= u.satA {
		return 0
	}
	d := e - u.satA
	return u.satB * d * d / e
}

// CoolantFactors returns the armature and field capability factors at
// coolant value c, interpolated linearly and clamped at the table's ends.
// inside is false when c lies outside the table. Without a table both
// factors are 1.
func (u *Unit) CoolantFactors(c float64) (armature, field float64, inside bool) {
	if !u.hasCoolant {
		return 1, 1, true
	}
	t := u.p.Coolant
	n := len(t.At)
	switch {
	case c <= t.At[0]:
		return t.Armature[0], t.Field[0], c == t.At[0]
	case c >= t.At[n-1]:
		return t.Armature[n-1], t.Field[n-1], c == t.At[n-1]
	}
	// One search serves both factors: i is the segment [At[i], At[i+1]).
	i := sort.SearchFloat64s(t.At, c)
	if t.At[i] != c {
		i--
	}
	w := (c - t.At[i]) / (t.At[i+1] - t.At[i])
	return t.Armature[i] + w*(t.Armature[i+1]-t.Armature[i]), t.Field[i] + w*(t.Field[i+1]-t.Field[i]), true
}

// Basis is what the steady-state stability limit assumes about the
// excitation (envelope.md, "Stability basis").
type Basis uint8

const (
	// BasisManual holds the field voltage constant: unstable where the
	// synchronizing coefficient K_s <= 0 or E_f <= 0.
	BasisManual Basis = iota
	// BasisAVR keeps the voltage regulator in service: the linearized
	// single-machine model with its exciter (and stabilizer), unstable
	// where a mode grows or an electromechanical mode is damped below
	// Params.ZetaMin.
	BasisAVR
)

// String returns the fleet-file spelling: "manual" or "avr".
func (b Basis) String() string {
	switch b {
	case BasisManual:
		return "manual"
	case BasisAVR:
		return "avr"
	}
	return fmt.Sprintf("Basis(%d)", uint8(b))
}

// Exciter is the voltage regulator and exciter of the avr basis: a
// single time constant exciter with gain K_A (IEEE 421.5 static-exciter
// form reduced to its small-signal gain, from memory), field voltage in
// pu of the air-gap-line field (1 pu E_fd gives 1 pu open-circuit
// voltage, unsaturated).
type Exciter struct {
	KA     float64 // regulator gain, pu E_fd per pu voltage error, >= 0
	TAS    float64 // exciter time constant T_A, s, > 0
	TRS    float64 // terminal-voltage transducer time constant T_R, s, >= 0 (0: no state)
	EfdMin float64 // lowest field voltage the exciter gives, pu (default 0)
	EfdMax float64 // ceiling field voltage, pu; 0 when not given (reported only)
}

// Stabilizer is a speed-input power system stabilizer: gain k, washout
// T_w and two lead-lag stages (T1/T2, T3/T4), all times in s.
type Stabilizer struct {
	K                       float64
	TWS, T1S, T2S, T3S, T4S float64
}

// UELShape is the form of an underexcitation limiter curve.
type UELShape uint8

const (
	// UELCircle is the IEEE 421.5 UEL1-like circle in the P-Q plane.
	UELCircle UELShape = iota
	// UELPoints is the IEEE 421.5 UEL2-like piecewise-linear curve with
	// voltage exponents (from memory).
	UELPoints
)

// UEL is an underexcitation limiter curve defined at 1.0 pu terminal
// voltage, in pu of machine MVA (coordination.md, "Curves").
type UEL struct {
	Shape UELShape

	// Circle: centre (CenterP, CenterQ) and radius, scaled with v^K.
	CenterP, CenterQ, Radius, K float64

	// Points: q_uel = v^K2 F(p / v^K1), F piecewise linear through
	// (P[i], Q[i]), held constant beyond the end points.
	P, Q   []float64
	K1, K2 float64
}

// At returns q_uel at active power p and terminal voltage v (pu): the
// lowest reactive power the limiter lets the unit reach. OK is false
// where the curve has no value at this p (a circle the vertical line
// p does not cross).
//
//	circle: q_uel = v^k (c_q - sqrt(r^2 - (p/v^k - c_p)^2))
//	points: q_uel = v^k2 F(p / v^k1)
//
// Source: coordination.md, after IEEE 421.5 UEL1 and UEL2 (from memory).
func (c *UEL) At(p, v float64) Bound {
	switch c.Shape {
	case UELCircle:
		s := math.Pow(v, c.K)
		d := p/s - c.CenterP
		r2 := c.Radius*c.Radius - d*d
		if r2 < 0 {
			return Bound{}
		}
		return some(s * (c.CenterQ - math.Sqrt(r2)))
	case UELPoints:
		n := len(c.P)
		if n == 0 {
			return Bound{}
		}
		x := p / math.Pow(v, c.K1)
		var f float64
		switch {
		case x <= c.P[0]:
			f = c.Q[0]
		case x >= c.P[n-1]:
			f = c.Q[n-1]
		default:
			i := sort.SearchFloat64s(c.P, x)
			if c.P[i] != x {
				i--
			}
			w := (x - c.P[i]) / (c.P[i+1] - c.P[i])
			f = c.Q[i] + w*(c.Q[i+1]-c.Q[i])
		}
		return some(math.Pow(v, c.K2) * f)
	}
	return Bound{}
}

// UELAt returns the unit's underexcitation limiter curve q_uel at p and
// v (pu); absent without a UEL or where the curve has no value at p.
func (u *Unit) UELAt(p, v float64) Bound {
	if u.p.UEL == nil {
		return Bound{}
	}
	return u.p.UEL.At(p, v)
}

// StabilityLimit returns q_stability(p, v), the steady-state stability
// limit on the unit's own basis with no practical margin, computed
// directly (no warm start), at rated coolant. Absent where the point has
// no stable operation. The coordination study and the reports use it.
//
// On the avr basis this is the search of avrInterval (envelope.md,
// "Which stable interval, and the limit").
func (u *Unit) StabilityLimit(p, v float64) Bound {
	return u.Bounds(p, v, 1, 1, nil).Stability
}
