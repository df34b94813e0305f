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
//   - theoretical and practical steady-state stability through the
//     external reactance Xe (stabilityLimits, roundStability)
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
// Where a source is marked "(from memory)" the value or wording was
// recalled, not re-read from the standard.
//
// Speed: a service evaluates about a million samples a second, so the
// curves are closed forms where they exist (round-rotor stability, the
// armature circle) and otherwise warm-started iterations from the unit's
// previous solution (Hint): Newton steps on the field limit, a bracketed
// Brent search on the salient-pole stability limits. Evaluate does not
// allocate.
package limits
