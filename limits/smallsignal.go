package limits

import (
	"errors"
	"math"
	"math/cmplx"

	"gonum.org/v1/gonum/mat"
)

// The linearized single-machine model of the avr stability basis
// (envelope.md, "The linearized model for the avr basis"): the
// Heffron-Phillips form of a one-axis (flux-decay) machine on an infinite
// bus through Xe, with a single time constant exciter, an optional
// terminal-voltage transducer and an optional speed-input stabilizer.
// Sources: F. P. de Mello and C. Concordia, "Concepts of synchronous
// machine stability as affected by excitation control", IEEE Trans. PAS,
// 1969; P. Kundur, Power System Stability and Control, 1994, ch. 12
// (both from memory, as the spec writes them).

// ErrSmallSignal reports that the eigenvalue solver did not converge on
// the state matrix of an operating point: the point's stability on the
// avr basis is unknown (it is not called stable or unstable).
var ErrSmallSignal = errors.New("limits: the eigenvalue solver did not converge on the small-signal model")

// maxSSStates is the largest state vector: dw, dd, dE'q, dVm, dEfd and
// the stabilizer's washout and two lead-lag states.
const maxSSStates = 8

// Small-signal instability thresholds (envelope.md, "Stability basis").
const (
	// ssGrowth is the real part, s^-1, above which a mode grows: an
	// undamped mode (Re = 0 to rounding) is the edge and counts as stable.
	ssGrowth = 1e-7
	// The electromechanical range of the damping-ratio rule, rad/s.
	emBandLo = 2 * math.Pi * 0.1
	emBandHi = 2 * math.Pi * 3.0
)

// HeffronPhillips are the constants of the linearized model at one
// operating point, all per unit on the machine base, with the initial
// values they are formed from. K1 and K2 are pu torque per rad and per
// pu E'q; K3 is dimensionless; K4 is pu E'q per rad; K5 pu voltage per
// rad; K6 pu voltage per pu E'q.
type HeffronPhillips struct {
	K1, K2, K3, K4, K5, K6 float64

	Delta   float64 // total angle from the infinite bus to the q axis, rad
	EB      float64 // infinite-bus voltage |V_s|, pu
	Eq1     float64 // E'q0, the voltage behind X'd on the q axis, pu
	Efd     float64 // E_fd0, the field voltage in pu of the air-gap-line field
	Ed, Eq  float64 // terminal voltage components e_d0, e_q0, pu
	Id, Iq  float64 // armature current components i_d0, i_q0, pu
	Degener bool    // |E_Q| or |V_s| is zero: the angle and the model are undefined
}

// HeffronPhillips returns the constants of the linearized model at
// (p, q, v), in the rotor frame of the q axis along E_Q = V + jXq I
// (ra = 0, unsaturated), with x_q = Re(X e^(-j theta)), x_d = -Im(X e^(-j theta)):
//
//	E'q0 = e_q0 + X'd i_d0, E_fd0 = e_q0 + Xd i_d0, E_B = |V - jXe I|
//	K1 = E_B cos(d) (E'q0 + (Xq - X'd) i_d0)/(Xq + Xe) + (Xq - X'd) i_q0 E_B sin(d)/(X'd + Xe)
//	K2 = E_B sin(d)/(X'd + Xe)
//	K3 = (X'd + Xe)/(Xd + Xe)
//	K4 = (Xd - X'd) E_B sin(d)/(X'd + Xe)
//	K5 = (e_d0/v) Xq E_B cos(d)/(Xq + Xe) - (e_q0/v) X'd E_B sin(d)/(X'd + Xe)
//	K6 = (e_q0/v) Xe/(X'd + Xe)
//
// Source: envelope.md after de Mello and Concordia (1969) and Kundur
// (1994) ch. 12, from memory. It needs X'd (Params.XdTransient) > 0.
func (u *Unit) HeffronPhillips(p, q, v float64) HeffronPhillips {
	return u.heffronPhillips(p, q, v, true)
}

// heffronPhillips is HeffronPhillips; the angle Delta (an arc tangent)
// only withDelta.
func (u *Unit) heffronPhillips(p, q, v float64, withDelta bool) HeffronPhillips {
	xd, xq, x1, xe := u.p.Xd, u.p.Xq, u.p.XdTransient, u.p.Xe
	// Reciprocals once, products after: a test of the table's build costs
	// one of these, and a division costs several multiplications.
	invV := 1 / v
	iR, iI := p*invV, -q*invV
	eqR, eqI := v-xq*iI, xq*iR  // E_Q = V + jXq I
	vsR, vsI := v+xe*iI, -xe*iR // V_s = V - jXe I
	n := math.Sqrt(eqR*eqR + eqI*eqI)
	var k HeffronPhillips
	k.EB = math.Sqrt(vsR*vsR + vsI*vsI)
	if n == 0 || k.EB == 0 {
		k.Degener = true
		return k
	}
	invN, invEB := 1/n, 1/k.EB
	c, s := eqR*invN, eqI*invN // e^(j theta)
	// X e^(-j theta) = (xR c + xI s) + j (xI c - xR s).
	k.Eq, k.Ed = v*c, v*s
	k.Iq, k.Id = iR*c+iI*s, -(iI*c - iR*s)
	usR, usI := vsR*invEB, vsI*invEB
	cosD, sinD := c*usR+s*usI, s*usR-c*usI // e^(j delta) = e^(j theta) conj(u_s)
	if withDelta {
		k.Delta = math.Atan2(sinD, cosD)
	}
	k.Eq1 = k.Eq + x1*k.Id
	k.Efd = k.Eq + xd*k.Id
	rq, r1 := 1/(xq+xe), 1/(x1+xe)
	ebC, ebS := k.EB*cosD, k.EB*sinD
	k.K1 = ebC*(k.Eq1+(xq-x1)*k.Id)*rq + (xq-x1)*k.Iq*ebS*r1
	k.K2 = ebS * r1
	k.K3 = (x1 + xe) / (xd + xe)
	k.K4 = (xd - x1) * ebS * r1
	k.K5 = k.Ed*invV*xq*ebC*rq - k.Eq*invV*x1*ebS*r1
	k.K6 = k.Eq * invV * xe * r1
	return k
}

// hpCore is what the stability tests take from HeffronPhillips: the
// constants of the characteristic polynomial other than K3 (a constant
// of the unit) and E_fd0.
type hpCore struct {
	k1, k2, k4, k5, k6, efd float64
	degener                 bool
}

// core returns the part of k the stability tests use.
func (k *HeffronPhillips) core() hpCore {
	return hpCore{k1: k.K1, k2: k.K2, k4: k.K4, k5: k.K5, k6: k.K6, efd: k.Efd, degener: k.Degener}
}

// hpConsts are the reactance terms of HeffronPhillips that depend on the
// unit alone, formed once per unit for hpCore.
type hpConsts struct {
	xd, xq, x1, xe float64
	rq, r1         float64 // 1/(Xq + Xe), 1/(X'd + Xe)
	k4, a5, b5, k6 float64 // (Xd - X'd)/(X'd + Xe), Xq/(Xq + Xe), X'd/(X'd + Xe), Xe/(X'd + Xe)
}

func (u *Unit) hpConsts() hpConsts {
	xd, xq, x1, xe := u.p.Xd, u.p.Xq, u.p.XdTransient, u.p.Xe
	rq, r1 := 1/(xq+xe), 1/(x1+xe)
	return hpConsts{xd: xd, xq: xq, x1: x1, xe: xe, rq: rq, r1: r1, k4: (xd - x1) * r1, a5: xq * rq, b5: x1 * r1, k6: xe * r1}
}

// hpCore is HeffronPhillips reduced to what the stability tests need
// (the same formulas; a test costs one of these). With E_B e^(j delta) =
// e^(j theta) conj(V_s), E_B cos(d) and E_B sin(d) come from E_Q and V_s
// without |V_s|: one square root and one division.
func (h *hpConsts) core(p, q, v float64) hpCore {
	invV := 1 / v
	iR, iI := p*invV, -q*invV
	eqR, eqI := v-h.xq*iI, h.xq*iR  // E_Q = V + jXq I
	vsR, vsI := v+h.xe*iI, -h.xe*iR // V_s = V - jXe I
	n2 := eqR*eqR + eqI*eqI
	if n2 == 0 || vsR*vsR+vsI*vsI == 0 {
		return hpCore{degener: true}
	}
	invN := 1 / math.Sqrt(n2)
	c, s := eqR*invN, eqI*invN // e^(j theta)
	eq, ed := v*c, v*s
	iq, id := iR*c+iI*s, -(iI*c - iR*s)
	ebC, ebS := c*vsR+s*vsI, s*vsR-c*vsI // E_B cos(d), E_B sin(d)
	var k hpCore
	k.efd = eq + h.xd*id
	// E'q0 + (Xq - X'd) i_d0 = e_q0 + Xq i_d0.
	k.k1 = ebC*(eq+h.xq*id)*h.rq + (h.xq-h.x1)*iq*ebS*h.r1
	k.k2 = ebS * h.r1
	k.k4 = h.k4 * ebS
	k.k5 = (ed*h.a5*ebC - eq*h.b5*ebS) * invV
	k.k6 = eq * invV * h.k6
	return k
}

// ssMatrix is the state matrix of the linearized model, row-major in the
// first n*n entries. States, in order: dw (pu speed), dd (rad), dE'q (pu),
// dVm (pu, only when T_R > 0), dEfd (pu), and with a stabilizer its
// washout state and its two lead-lag states.
type ssMatrix struct {
	a [maxSSStates * maxSSStates]float64
	n int
}

// minTransducerS is the shortest voltage-transducer time constant, s,
// that the model keeps as a state: a faster transducer is taken as
// instantaneous (dVm = dVt). Its pole would lie beyond 10^4 s^-1, far
// outside the dynamics of interest, and would make the state matrix and
// the characteristic polynomial too stiff for double precision (our
// choice; the spec allows T_R = 0).
const minTransducerS = 1e-4

// transducer says whether the exciter's transducer is a state.
func (e *Exciter) transducer() bool { return e.TRS >= minTransducerS }

// State indices of the linearized model.
const (
	ssW = iota // speed deviation dw
	ssD        // angle deviation dd
	ssE        // dE'q
)

// stateMatrix forms the state matrix from the constants k:
//
//	2H d(dw)/dt    = -K1 dd - K2 dE'q - D dw
//	d(dd)/dt       = omega_s dw
//	T'd0 d(dE'q)/dt = dEfd - dE'q/K3 - K4 dd
//	T_R d(dVm)/dt  = -dVm + K5 dd + K6 dE'q       (dVm = K5 dd + K6 dE'q when T_R = 0)
//	T_A d(dEfd)/dt = -dEfd + K_A (-dVm + dVpss)
//	dVpss = k (s T_w/(1 + s T_w)) ((1 + s T1)/(1 + s T2)) ((1 + s T3)/(1 + s T4)) dw
//
// The washout is z' = (k dw - z)/T_w with output k dw - z; a lead-lag
// (1 + s Ta)/(1 + s Tb) on input y is x' = (y - x)/Tb with output
// x + (Ta/Tb)(y - x). Source: envelope.md (Kundur 1994, ch. 12, from memory).
func (u *Unit) stateMatrix(k *HeffronPhillips) ssMatrix {
	var m ssMatrix
	ex, ps := u.p.Exciter, u.p.Stabilizer
	n := 4
	vm := -1
	if ex.transducer() {
		vm = 3
		n++
	}
	efd := n - 1
	zw, x2, x3 := -1, -1, -1
	if ps != nil {
		zw, x2, x3 = n, n+1, n+2
		n += 3
	}
	m.n = n
	set := func(i, j int, x float64) { m.a[i*n+j] += x }
	h2 := 2 * u.p.InertiaHS
	ws := 2 * math.Pi * u.p.FrequencyHz
	td0 := u.p.Td0TransientS
	set(ssW, ssW, -u.p.DampingPU/h2)
	set(ssW, ssD, -k.K1/h2)
	set(ssW, ssE, -k.K2/h2)
	set(ssD, ssW, ws)
	set(ssE, ssD, -k.K4/td0)
	set(ssE, ssE, -1/(k.K3*td0))
	set(ssE, efd, 1/td0)
	// The exciter's input -dVm + dVpss as a row vector over the states.
	var in [maxSSStates]float64
	if vm >= 0 {
		set(vm, ssD, k.K5/ex.TRS)
		set(vm, ssE, k.K6/ex.TRS)
		set(vm, vm, -1/ex.TRS)
		in[vm] = -1
	} else {
		in[ssD], in[ssE] = -k.K5, -k.K6
	}
	if ps != nil {
		var w, y2 [maxSSStates]float64 // washout output, first lead-lag output
		w[ssW], w[zw] = ps.K, -1
		set(zw, ssW, ps.K/ps.TWS)
		set(zw, zw, -1/ps.TWS)
		for j := range n {
			set(x2, j, w[j]/ps.T2S)
			y2[j] = ps.T1S / ps.T2S * w[j]
		}
		set(x2, x2, -1/ps.T2S)
		y2[x2] += 1 - ps.T1S/ps.T2S
		for j := range n {
			set(x3, j, y2[j]/ps.T4S)
			in[j] += ps.T3S / ps.T4S * y2[j]
		}
		set(x3, x3, -1/ps.T4S)
		in[x3] += 1 - ps.T3S/ps.T4S
	}
	for j := range n {
		set(efd, j, ex.KA/ex.TAS*in[j])
	}
	set(efd, efd, -1/ex.TAS)
	return m
}

// eigenvalues returns the eigenvalues of the state matrix m (gonum
// mat.Eigen, LAPACK Dgeev), or ErrSmallSignal when the solver fails.
func (m *ssMatrix) eigenvalues() ([]complex128, error) {
	var e mat.Eigen
	if err := m.factorize(&e, mat.EigenNone); err != nil {
		return nil, err
	}
	return e.Values(nil), nil
}

// factorize runs the eigen decomposition of m into e. A matrix with a
// non-finite entry, a solver that does not converge, or one that panics
// is ErrSmallSignal: never NaN, never a panic out of the engine.
func (m *ssMatrix) factorize(e *mat.Eigen, kind mat.EigenKind) (err error) {
	for _, x := range m.a[:m.n*m.n] {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return ErrSmallSignal
		}
	}
	defer func() {
		if recover() != nil {
			err = ErrSmallSignal
		}
	}()
	a := mat.NewDense(m.n, m.n, append([]float64(nil), m.a[:m.n*m.n]...))
	if !e.Factorize(a, kind) {
		return ErrSmallSignal
	}
	return nil
}

// modeUnstable applies the avr basis' rule to one eigenvalue lambda
// (s^-1): unstable when it grows (Re > 1e-7 s^-1), or when it is an
// electromechanical mode (|Im| in [2 pi 0.1, 2 pi 3.0] rad/s) damped
// below zetaMin, zeta = -Re/|lambda|. The damping rule is applied with
// the same 1e-7 s^-1 allowance, Re > 1e-7 - zetaMin |lambda|, so that
// with zetaMin = 0 an undamped mode is the edge under both rules (a
// choice where the spec is silent).
func modeUnstable(l complex128, zetaMin float64) bool {
	re, im := real(l), math.Abs(imag(l))
	if re > ssGrowth {
		return true
	}
	if zetaMin > 0 && im >= emBandLo && im <= emBandHi {
		return re > ssGrowth-zetaMin*math.Hypot(re, im)
	}
	return false
}

// avrStable says whether (p, q, v) is stable on the avr basis: E_fd0 at
// least efd_min and no eigenvalue of the linearized model unstable by
// modeUnstable. A degenerate point (|E_Q| or |V_s| zero) is unstable.
// err is ErrSmallSignal when the eigenvalues could not be found.
func (u *Unit) avrStable(p, q, v float64) (bool, error) {
	k := u.HeffronPhillips(p, q, v)
	if k.Degener || k.Efd < u.p.Exciter.EfdMin {
		return false, nil
	}
	m := u.stateMatrix(&k)
	ev, err := m.eigenvalues()
	if err != nil {
		return false, err
	}
	for _, l := range ev {
		if modeUnstable(l, u.p.ZetaMin) {
			return false, nil
		}
	}
	return true, nil
}

// RotorMode is the electromechanical (rotor) mode of the linearized
// model at one operating point: the complex eigenvalue in which the
// rotor angle and speed take the largest part.
type RotorMode struct {
	FrequencyHz  float64 // Im(lambda)/(2 pi)
	DampingRatio float64 // -Re(lambda)/|lambda|
	Eigenvalue   complex128
}

// RotorMode returns the rotor mode at the operating point pt on the avr
// basis, solved when called (an eigen decomposition with left and right
// eigenvectors, some microseconds; not for the per-sample path). ok is
// false on the manual basis, at a degenerate point, or where no
// oscillatory mode exists (the rotor mode is then overdamped). err is
// ErrSmallSignal when the solver fails.
//
// The mode is the one of positive imaginary part with the largest sum
// of the participation factors of dw and dd, p_ki = |w_ik v_ki|/|w_i . v_i|
// (Kundur 1994, sec. 12.2, from memory). The service shows it as
// rotor_mode: {frequency_hz, damping_ratio}.
func (u *Unit) RotorMode(pt Point) (mode RotorMode, ok bool, err error) {
	if u.p.Basis != BasisAVR {
		return RotorMode{}, false, nil
	}
	k := u.HeffronPhillips(pt.P, pt.Q, pt.V)
	if k.Degener {
		return RotorMode{}, false, nil
	}
	m := u.stateMatrix(&k)
	var e mat.Eigen
	if err := m.factorize(&e, mat.EigenLeft|mat.EigenRight); err != nil {
		return RotorMode{}, false, err
	}
	vals := e.Values(nil)
	var vr, vl mat.CDense
	e.VectorsTo(&vr)
	e.LeftVectorsTo(&vl)
	best := -1.0
	for i, l := range vals {
		if imag(l) <= 0 {
			continue
		}
		var dot complex128
		for s := range m.n {
			dot += cmplx.Conj(vl.At(s, i)) * vr.At(s, i) // left eigenvector u: u^H A = lambda u^H
		}
		if dot == 0 {
			continue
		}
		part := 0.0
		for _, s := range [...]int{ssW, ssD} {
			part += cabs(cmplx.Conj(vl.At(s, i))*vr.At(s, i)) / cabs(dot)
		}
		if part > best {
			best = part
			mode = RotorMode{FrequencyHz: imag(l) / (2 * math.Pi), DampingRatio: -real(l) / cabs(l), Eigenvalue: l}
		}
	}
	return mode, best >= 0, nil
}

func cabs(z complex128) float64 { return math.Hypot(real(z), imag(z)) }
