package limits

import "math"

// CriticalClearingTime returns the critical clearing time, in seconds, of
// a bolted three-phase fault at the infinite-bus side that passes no
// power and is cleared with the network unchanged, for the classical
// model (constant E' behind Xd') at the operating point (p, q, v) in pu:
//
//	E' = V + jXd' I, V_s = V - jXe I, delta_0 = arg(E') - arg(V_s)
//	cos(delta_cr) = (pi - 2 delta_0) sin(delta_0) - cos(delta_0)
//	t_cr = sqrt(4 H (delta_cr - delta_0) / (omega_s p)), omega_s = 2 pi f
//
// The angle follows from the equal-area criterion and the time from the
// swing equation (2H/omega_s) d^2(delta)/dt^2 = p while the fault passes
// no power (textbook; e.g. Kundur, Power System Stability and Control,
// 1994, ch. 13). The bound is absent when Xd' or H is not known, the
// unit is not generating (p <= 0), or the point is not steady-state
// stable on the manual basis (K_s <= 0 or E_f <= 0; envelope.md: a
// clearing time of a point that cannot hold its own equilibrium means
// nothing); it is 0 where the classical model has no stable post-fault
// equilibrium (delta_0 >= 90 degrees).
func (u *Unit) CriticalClearingTime(p, q, v float64) Bound {
	if !u.hasTransient || !(p > 0) {
		return Bound{}
	}
	if s := u.stab(p, q, v); s.degen || !(s.ks > 0 && s.ef > 0) {
		return Bound{}
	}
	xt, xe := u.p.XdTransient, u.p.Xe
	iR, iI := p/v, -q/v
	eR, eI := v-xt*iI, xt*iR
	sR, sI := v+xe*iI, -xe*iR
	// e^{j delta_0} is along E' conj(V_s).
	y, x := eI*sR-eR*sI, eR*sR+eI*sI
	if x <= 0 {
		return some(0)
	}
	n := math.Sqrt(x*x + y*y)
	d0 := math.Atan2(y, x)
	c := (math.Pi-2*d0)*(y/n) - x/n
	c = math.Max(-1, math.Min(1, c))
	dcr := math.Acos(c)
	ws := 2 * math.Pi * u.p.FrequencyHz
	return some(math.Sqrt(4 * u.p.InertiaHS * (dcr - d0) / (ws * p)))
}
