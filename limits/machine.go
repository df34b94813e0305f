package limits

import "math"

// The steady-state phasor model. Conventions (see doc.go): terminal
// voltage V = v at angle 0; generator convention, so the armature current
// is I = (p - jq)/v; per unit on the machine base.
//
// Complex quantities are kept as explicit (re, im) pairs: the model is on
// the hot path of every sample and this keeps it free of calls to
// math.Hypot and of allocations.

// fieldState is the field-current model at one operating point.
type fieldState struct {
	ef   float64 // internal EMF behind Xd, pu (unsaturated)
	ep   float64 // Potier voltage, pu
	ifd  float64 // field current, pu of IFag
	dIfd float64 // d ifd / dq at constant p and v
	eqR  float64 // E_Q = V + (ra + jXq) I
	eqI  float64
}

// field evaluates the field-current model at (p, q, v):
//
//	E_Q = V + (ra + jXq) I, u_q = E_Q/|E_Q|
//	E_f = |E_Q| + (Xd - Xq) I_d, I_d = Re(I) Im(u_q) - Im(I) Re(u_q)
//	E_p = |V + (ra + jXp) I|
//	i_fd = E_f + B (E_p - A)^2 for E_p > A
//
// Two-reaction theory; the saturation increment is taken at the Potier
// voltage (IEEE Std 115 approach, from memory). I_d is the component of I
// along the d axis, which lags u_q by 90 degrees; for a round rotor
// (Xq = Xd) E_f reduces to |V + (ra + jXd) I|. withDeriv also returns
// d i_fd/dq, used by the Newton iteration on the field limit.
func (u *Unit) field(p, q, v float64, withDeriv bool) fieldState {
	ra, xd, xq, xp := u.p.Ra, u.p.Xd, u.p.Xq, u.p.Xp
	invV := 1 / v
	iR, iI := p*invV, -q*invV
	eqR := v + ra*iR - xq*iI
	eqI := ra*iI + xq*iR
	n := math.Sqrt(eqR*eqR + eqI*eqI)
	var s fieldState
	s.eqR, s.eqI = eqR, eqI
	var uqR, uqI, invN float64
	if n > 0 {
		invN = 1 / n
		uqR, uqI = eqR*invN, eqI*invN
	}
	id := iR*uqI - iI*uqR
	s.ef = n + (xd-xq)*id
	epR := v + ra*iR - xp*iI
	epI := ra*iI + xp*iR
	s.ep = math.Sqrt(epR*epR + epI*epI)
	sat := 0.0
	if u.satB > 0 && s.ep > u.satA {
		d := s.ep - u.satA
		sat = u.satB * d * d
	}
	s.ifd = s.ef + sat
	if !withDeriv || n == 0 {
		return s
	}
	// Derivatives with respect to q: dI/dq = -j/v, so dIm(I)/dq = -1/v.
	dIi := -invV
	dEqR := -xq * dIi
	dEqI := ra * dIi
	dn := (eqR*dEqR + eqI*dEqI) * invN
	duqR := (dEqR - uqR*dn) * invN
	duqI := (dEqI - uqI*dn) * invN
	did := iR*duqI - (dIi*uqR + iI*duqR)
	dEf := dn + (xd-xq)*did
	dSat := 0.0
	if sat > 0 {
		dEpR := -xp * dIi
		dEpI := ra * dIi
		dEp := (epR*dEpR + epI*dEpI) / s.ep
		dSat = 2 * u.satB * (s.ep - u.satA) * dEp
	}
	s.dIfd = dEf + dSat
	return s
}

// FieldCurrent returns the model field current at (p, q, v) in pu of
// IFag: the air-gap-line field current E_f plus the saturation increment
// at the Potier voltage (IEEE Std 115, from memory).
func (u *Unit) FieldCurrent(p, q, v float64) float64 {
	return u.field(p, q, v, false).ifd
}

// LoadAngle returns the internal load angle at (p, q, v), in radians:
// the angle of the q axis, E_Q = V + (ra + jXq) I, ahead of the terminal
// voltage (two-reaction theory).
func (u *Unit) LoadAngle(p, q, v float64) float64 {
	s := u.field(p, q, v, false)
	return math.Atan2(s.eqI, s.eqR)
}

// stabState is the machine seen from the infinite bus, with ra = 0 and
// unsaturated reactances, at one operating point.
type stabState struct {
	ef    float64 // internal EMF, pu
	vs    float64 // |V_s|, the infinite-bus voltage V - jXe I, pu
	cosD  float64 // cos and sin of the total angle delta = arg(E_Q) - arg(V_s)
	sinD  float64
	degen bool    // |E_Q| or |V_s| is zero: the angle is undefined
	a, b  float64 // P(delta) = a sin(delta) + b sin(2 delta)
	ks    float64 // synchronizing coefficient dP/d(delta), pu/rad
}

// stab evaluates the steady-state stability quantities at (p, q, v):
//
//	V_s = V - jXe I, E_Q = V + jXq I, delta = arg(E_Q) - arg(V_s)
//	P(delta) = (E_f V_s / X_dS) sin(delta) + (V_s^2/2)(1/X_qS - 1/X_dS) sin(2 delta)
//	K_s = dP/d(delta) = a cos(delta) + 2b cos(2 delta)
//
// with X_dS = Xd + Xe, X_qS = Xq + Xe. The angle is formed without
// trigonometry: e^{j delta} = u_q conj(u_s).
func (u *Unit) stab(p, q, v float64) stabState {
	xd, xq, xe := u.p.Xd, u.p.Xq, u.p.Xe
	iR, iI := p/v, -q/v
	eqR, eqI := v-xq*iI, xq*iR
	vsR, vsI := v+xe*iI, -xe*iR
	n := math.Sqrt(eqR*eqR + eqI*eqI)
	var s stabState
	s.vs = math.Sqrt(vsR*vsR + vsI*vsI)
	if n == 0 || s.vs == 0 {
		s.degen = true
		return s
	}
	uqR, uqI := eqR/n, eqI/n
	usR, usI := vsR/s.vs, vsI/s.vs
	s.cosD = uqR*usR + uqI*usI
	s.sinD = uqI*usR - uqR*usI
	id := iR*uqI - iI*uqR
	s.ef = n + (xd-xq)*id
	xdS, xqS := xd+xe, xq+xe
	s.a = s.ef * s.vs / xdS
	s.b = 0.5 * s.vs * s.vs * (1/xqS - 1/xdS)
	s.ks = s.a*s.cosD + 2*s.b*(2*s.cosD*s.cosD-1)
	return s
}

// peakPower returns the maximum of a sin(d) + b sin(2d) over d in [0, pi]
// for a, b >= 0. Setting the derivative to zero gives
// 4b cos^2 d + a cos d - 2b = 0, so cos d* = (-a + sqrt(a^2 + 32 b^2))/(8b);
// b = 0 (round rotor) peaks at a, at 90 degrees.
func peakPower(a, b float64) float64 {
	if b <= 1e-15*math.Abs(a) {
		return math.Max(a, 0)
	}
	c := (-a + math.Sqrt(a*a+32*b*b)) / (8 * b)
	if c > 1 {
		c = 1
	}
	s := math.Sqrt(1 - c*c)
	return a*s + 2*b*s*c
}
