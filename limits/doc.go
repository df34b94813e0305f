// Package limits computes where a synchronous generator stands against
// its capability and stability limits: the envelope of reactive and
// active power it may deliver or absorb at its actual terminal voltage,
// coolant condition and grid strength, and the margin to each limit.
//
// It is pure computation: no I/O, no logging, no clocks. Everything
// inside is per unit on the machine's own base (S_base = rated MVA,
// V_base = rated line-line kV, I_base = S_base/(sqrt(3) V_base)); field
// current is in per unit of IFag, the field current on the air-gap line
// at rated voltage, open circuit (IEEE Std 115 / IEEE Std 1110 term).
// Base converts at the edges.
//
// Conventions: generator convention (P > 0 delivered; Q > 0 delivered,
// overexcited, lagging; Q < 0 underexcited, leading); terminal voltage
// V = v at angle 0; armature current I = (p - jq)/v.
//
// The limits, each documented where it is computed:
//
//   - armature heating: p^2 + q^2 <= (v i_max)^2 (Bounds)
//   - field heating: i_fd(p, q, v) <= i_fd_max, two-reaction model with
//     quadratic saturation at the Potier voltage (field, fieldLimit)
//   - steady-state stability through the external reactance Xe on the
//     unit's basis (stabilityLimits): manual, the field voltage held
//     constant (K_s > 0, E_f > 0; roundStability in closed form), or avr,
//     the voltage regulator in service (below)
//   - stator end-region heating from the maker's curve (Bounds)
//   - the prime mover's active-power range (Evaluate)
//   - volts per hertz and the IEC 60034-1 voltage/frequency zones (zone.go)
//   - short-time thermal capability, IEEE C50.13 (Thermal)
//   - the classical-model critical clearing time (CriticalClearingTime)
//   - the regulator's limiters and the generator protection against the
//     machine: inverse-time curves, the mho zones' P-Q images, the
//     coordination checks (protection.go, coordination.go; Coordinate)
//     and the live limiter timers (LimiterTimer)
//
// The avr basis (Params.Basis, envelope.md "The linearized model for the
// avr basis") is small-signal stability of the Heffron-Phillips model of
// de Mello and Concordia (1969): a one-axis machine on an infinite bus
// through Xe, a single time constant exciter (K_A, T_A), an optional
// voltage transducer (T_R) and an optional speed-input stabilizer
// (washout and two lead-lag stages). HeffronPhillips gives the constants
// K1..K6 at an operating point; the state matrix's eigenvalues (gonum
// mat.Eigen) decide stability: no eigenvalue with Re > 1e-7 s^-1, the
// electromechanical modes (0.1 to 3 Hz) damped at least Params.ZetaMin,
// and E_fd0 at least the exciter's floor. On both bases the limit is the
// bottom of the topmost stable interval below q_max, found by a downward
// scan in 0.02 pu steps and bisection (topInterval); where q_max itself
// is unstable it moves down to the top of that interval (QMaxLimit
// stability). RotorMode gives the rotor mode's frequency and damping
// ratio at a point, solved when called. An eigen solver failure is
// ErrSmallSignal in Bounds.StabilityErr, with the point infeasible for
// reason stability; never NaN.
//
// Where a source is marked "(from memory)" the value or wording was
// recalled, not re-read from the standard.
//
// Speed: a service evaluates about a million samples a second, so the
// curves are closed forms where they exist (round-rotor stability, the
// armature circle) and otherwise warm-started iterations from the unit's
// previous solution (Hint): Newton steps on the field limit, a bracketed
// Brent search on the salient-pole stability limits. On the avr basis the
// direct search (a Routh-Hurwitz scan confirmed by eigenvalues) takes
// tens of microseconds, so New builds a table of the limit over p and v
// per unit, and the per-sample path (Evaluate and
// EvaluateSample with a Hint) interpolates it, checking the answer with
// two Routh-Hurwitz tests of the characteristic polynomial where the
// table is not smooth, and by the table build's band detector where that
// cannot tell (stabTable, fastInterval): within 0.002 pu of the direct
// computation. Bounds, StabilityLimit, Envelope and Evaluate with
// a nil Hint compute directly. Evaluate does not allocate.
package limits
