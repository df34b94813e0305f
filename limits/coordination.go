package limits

import (
	"math"
)

// The coordination study (coordination.md, "Coordination checks"): the
// regulator's limiters and the generator protection checked against the
// machine's capability and stability, on a grid of terminal voltages and
// active powers. Everything is in pu on the machine base; margins in
// pu of rated MVA, as ratios, or in pu of rated V/Hz (MarginKind).

// Status is the verdict of one coordination check.
type Status uint8

const (
	StatusPass          Status = iota // the check holds over its whole range
	StatusFail                        // somewhere it does not
	StatusNotApplicable               // an input it needs is not given
)

// String returns "pass", "fail" or "not_applicable".
func (s Status) String() string {
	switch s {
	case StatusPass:
		return "pass"
	case StatusFail:
		return "fail"
	}
	return "not_applicable"
}

// MarginKind is the unit a check's margin is in.
type MarginKind uint8

const (
	MarginPowerPU MarginKind = iota // pu of rated MVA (reported in Mvar)
	MarginRatio                     // a ratio of times
	MarginPU                        // pu of rated V/Hz, or of rated current for a pickup
)

// String returns the margin's unit as the reports write it: "Mvar",
// "ratio" or "pu".
func (k MarginKind) String() string {
	switch k {
	case MarginPowerPU:
		return "Mvar"
	case MarginRatio:
		return "ratio"
	}
	return "pu"
}

// The checks, in the contract's order.
const (
	CheckUELWithinCapability = iota
	CheckUELAboveStability
	CheckUELBeforeLossOfField
	CheckOELBeforeFieldCapability
	CheckFieldProtectionAfterOEL
	CheckSCLBeforeArmatureCapability
	CheckVHzLimiterWithinCapability
	CheckVHzLimiterBeforeRelay
	NumChecks
)

// CheckNames returns the checks' names in the contract's order.
func CheckNames() [NumChecks]string {
	return [...]string{
		"uel_within_capability",
		"uel_above_stability",
		"uel_before_loss_of_field",
		"oel_before_field_capability",
		"field_protection_after_oel",
		"scl_before_armature_capability",
		"vhz_limiter_within_capability",
		"vhz_limiter_before_relay",
	}
}

// StudyVoltages are the terminal voltages of the study grid, pu.
func StudyVoltages() [3]float64 { return [3]float64{0.95, 1.00, 1.05} }

// StudySteps is the number of active-power points of the study grid,
// from 0 to p_max.
const StudySteps = 41

// Check is the result of one coordination check.
type Check struct {
	Name   string
	Status Status
	Margin float64 // worst (smallest) signed value; positive when it passes
	Kind   MarginKind

	// The grid point where the margin is worst (grid checks only).
	HasWorst  bool
	WorstV    float64 // pu
	WorstP    float64 // pu
	Limit     float64 // the value the setting is compared with there (q pu, time s, or V/Hz pu)
	Setting   float64 // the setting's value there (q_uel pu, the limiter's time s, or V/Hz pu)
	Against   string  // what Limit is: "armature", "end_region", "stability", "zone 2", "C50.13 field", ...
	WorstX    float64 // current (pu) where a time check is worst; 0 for others
	BelowRate bool    // a time check failed because the pickup is below the rating

	Missing []string // not applicable: the fleet-file keys that would enable it
	Skipped int      // grid points where the comparison had no value on one side
	Points  []Failing
}

// Failing is a grid point where a grid check fails (for charts).
type Failing struct{ V, P float64 }

// Study is every coordination check of one unit, in the contract's order,
// with what the report draws about the loss-of-field zones.
type Study struct {
	Checks [NumChecks]Check

	// Zone2OverStability, per study voltage: the range of p (pu) over
	// which the manual stability limit lies inside zone 2's P-Q image;
	// ok false where it nowhere does or there is no zone 2.
	Zone2OverStability [3]struct {
		PLo, PHi float64
		OK       bool
	}
}

// Coordinate runs the coordination checks of unit u with settings s.
// Grid checks run at rated coolant on v in StudyVoltages and p from 0 to
// the prime mover's p_max in StudySteps equal steps (coordination.md).
func (u *Unit) Coordinate(s *Settings) Study {
	var st Study
	names := CheckNames()
	for i := range st.Checks {
		st.Checks[i] = Check{Name: names[i], Status: StatusNotApplicable}
	}
	uel := u.p.UEL
	var lof []MhoZone
	if s.LossOfField != nil {
		lof = s.LossOfField.Zones
	}

	// The grid checks.
	c0, c1, c2 := &st.Checks[CheckUELWithinCapability], &st.Checks[CheckUELAboveStability], &st.Checks[CheckUELBeforeLossOfField]
	if uel == nil {
		c0.Missing = []string{"excitation.uel"}
		c1.Missing = []string{"excitation.uel"}
		c2.Missing = []string{"excitation.uel"}
	}
	if len(lof) == 0 {
		c2.Missing = append(c2.Missing, "protection.loss_of_field")
	}
	if uel != nil {
		grid := newWorst(c0, MarginPowerPU)
		stab := newWorst(c1, MarginPowerPU)
		var zone *worst
		if len(lof) > 0 {
			zone = newWorst(c2, MarginPowerPU)
		}
		for _, v := range StudyVoltages() {
			for i := 0; i < StudySteps; i++ {
				p := u.p.PMax * float64(i) / float64(StudySteps-1)
				q := uel.At(p, v)
				b := u.Bounds(p, v, 1, 1, nil)
				if !q.OK || !b.ArmatureDown.OK {
					// The limiter does not bound q here, or the unit
					// cannot run here at all.
					grid.skip()
					stab.skip()
					zone.skip()
					continue
				}
				lim, against := b.ArmatureDown.V, "armature"
				if b.EndRegion.OK && b.EndRegion.V > lim {
					lim, against = b.EndRegion.V, "end_region"
				}
				// q_uel >= max(armature, end region)
				grid.at(v, p, q.V-lim, q.V, lim, against, q.V-lim >= 0)
				// q_uel >= q_stability on the unit's basis
				if qs := u.StabilityLimit(p, v); qs.OK {
					stab.at(v, p, q.V-qs.V, q.V, qs.V, "stability", q.V-qs.V >= 0)
				} else {
					stab.skip()
				}
				// q_uel > the top of every zone's P-Q image at p
				if zone != nil {
					reached := false
					for k, z := range lof {
						top := ZoneTop(z, p, v)
						if !top.OK {
							continue
						}
						reached = true
						zone.at(v, p, q.V-top.V, q.V, top.V, zoneName(k), q.V-top.V > 0)
					}
					if !reached {
						zone.skip()
					}
				}
			}
		}
		grid.done()
		stab.done()
		if zone != nil {
			zone.done()
		}
	}

	// The time checks.
	if s.OEL == nil {
		st.Checks[CheckOELBeforeFieldCapability].Missing = []string{"excitation.oel"}
	} else {
		timeCheck(&st.Checks[CheckOELBeforeFieldCapability], s.OEL, nil, FieldK, 1.13, 2.09, "C50.13 field")
	}
	switch {
	case s.OEL == nil && s.FieldOvercurrent == nil:
		st.Checks[CheckFieldProtectionAfterOEL].Missing = []string{"excitation.oel", "protection.field_overcurrent"}
	case s.OEL == nil:
		st.Checks[CheckFieldProtectionAfterOEL].Missing = []string{"excitation.oel"}
	case s.FieldOvercurrent == nil:
		st.Checks[CheckFieldProtectionAfterOEL].Missing = []string{"protection.field_overcurrent"}
	default:
		timeCheck(&st.Checks[CheckFieldProtectionAfterOEL], s.OEL, s.FieldOvercurrent, FieldK, 1.13, 2.09, "field overcurrent relay")
	}
	if s.SCL == nil {
		st.Checks[CheckSCLBeforeArmatureCapability].Missing = []string{"excitation.scl"}
	} else {
		timeCheck(&st.Checks[CheckSCLBeforeArmatureCapability], s.SCL, nil, ArmatureK, 1.16, 2.26, "C50.13 armature")
	}

	// The V/Hz checks.
	c6, c7 := &st.Checks[CheckVHzLimiterWithinCapability], &st.Checks[CheckVHzLimiterBeforeRelay]
	if s.VHzLimiter <= 0 {
		c6.Missing = []string{"excitation.vhz_limiter"}
		c7.Missing = []string{"excitation.vhz_limiter"}
	}
	if len(s.VHzRelay) == 0 {
		c7.Missing = append(c7.Missing, "protection.volts_per_hertz")
	}
	if s.VHzLimiter > 0 {
		// setpoint <= min(1.05, 1.05 kv_lv / kV) (C37.102 / C57.12.00, from memory)
		lim, against := GeneratorVHzContinuous, "generator"
		if t := s.Transformer; t != nil {
			if tr, _ := TransformerVHzCapability(t.LVRatio); tr < lim {
				lim, against = tr, "transformer"
			}
		}
		setCheck(c6, lim-s.VHzLimiter, s.VHzLimiter, lim, against, lim-s.VHzLimiter >= 0)
		if len(s.VHzRelay) > 0 {
			low := s.VHzRelay[0].Pickup
			for _, g := range s.VHzRelay[1:] {
				low = math.Min(low, g.Pickup)
			}
			setCheck(c7, low-s.VHzLimiter, s.VHzLimiter, low, "relay", low-s.VHzLimiter > 0)
		}
	}

	// Where zone 2 reaches over the manual stability limit.
	if len(lof) >= 2 {
		manual := u
		if u.p.Basis != BasisManual {
			mp := u.p
			mp.Basis = BasisManual
			if m, err := New(mp); err == nil {
				manual = m
			}
		}
		z2 := lof[1]
		for k, v := range StudyVoltages() {
			r := &st.Zone2OverStability[k]
			for i := 0; i < StudySteps; i++ {
				p := u.p.PMax * float64(i) / float64(StudySteps-1)
				qs := manual.StabilityLimit(p, v)
				top := ZoneTop(z2, p, v)
				if !qs.OK || !top.OK {
					continue
				}
				cq, _ := MhoPQ(z2.Offset, z2.Diameter, v)
				bottom := 2*cq - top.V
				if qs.V <= top.V && qs.V >= bottom {
					if !r.OK {
						r.PLo, r.OK = p, true
					}
					r.PHi = p
				}
			}
		}
	}
	return st
}

func zoneName(k int) string {
	return "zone " + string(rune('1'+k))
}

// worst collects the worst margin of a grid check.
type worst struct {
	c    *Check
	seen bool
	fail bool
}

func newWorst(c *Check, kind MarginKind) *worst {
	c.Kind = kind
	return &worst{c: c}
}

func (w *worst) skip() {
	if w != nil {
		w.c.Skipped++
	}
}

// at records the margin m at grid point (v, p); setting and limit are the
// compared values, pass whether the point passes.
func (w *worst) at(v, p, m, setting, limit float64, against string, pass bool) {
	c := w.c
	if !pass {
		w.fail = true
		if n := len(c.Points); n == 0 || c.Points[n-1] != (Failing{v, p}) {
			c.Points = append(c.Points, Failing{v, p})
		}
	}
	if !w.seen || m < c.Margin {
		w.seen = true
		c.Margin, c.HasWorst, c.WorstV, c.WorstP = m, true, v, p
		c.Setting, c.Limit, c.Against = setting, limit, against
	}
}

// done sets the status: pass when every point passed; a check with no
// point compared at all passes with no worst point (nothing to coordinate
// in the grid, which its detail says).
func (w *worst) done() {
	if w.fail {
		w.c.Status = StatusFail
	} else {
		w.c.Status = StatusPass
	}
}

func setCheck(c *Check, m, setting, limit float64, against string, pass bool) {
	c.Kind, c.Margin, c.Setting, c.Limit, c.Against = MarginPU, m, setting, limit, against
	c.Status = StatusFail
	if pass {
		c.Status = StatusPass
	}
}

// timeCheck checks that characteristic lim acts before the winding's
// C50.13 capability (relay nil), or that relay acts after lim, for x from
// max(pickup, lo) to min(ceiling, hi) in 0.01 pu steps; points where
// lim's time is infinite are skipped (coordination.md). The margin is the
// smallest (t_other - t_lim)/t_other; a pickup below 1.0 pu fails with
// margin pickup - 1.0 (pu).
func timeCheck(c *Check, lim, relay *InverseTime, k, lo, hi float64, against string) {
	c.Kind, c.Against = MarginRatio, against
	pick := lim.PickupPU()
	if relay == nil && pick < 1.0 {
		c.Status, c.Kind, c.Margin, c.BelowRate = StatusFail, MarginPU, pick-1.0, true
		c.WorstX, c.Setting, c.Limit = pick, pick, 1.0
		return
	}
	from := math.Max(pick, lo)
	if lim.Ceiling > 0 && lim.Ceiling <= from {
		// The limiter acts at once over the whole range.
		c.Status, c.Margin = StatusPass, 1
		return
	}
	to := hi
	if lim.Ceiling > 0 {
		to = math.Min(lim.Ceiling, hi)
	}
	seen := false
	// Integer steps of 0.01 pu from the first grid value at or above from.
	for n := int(math.Ceil(from*100 - 1e-9)); float64(n)/100 <= to+1e-9; n++ {
		x := float64(n) / 100
		tl := lim.Time(x)
		if math.IsInf(tl, 1) {
			c.Skipped++
			continue
		}
		var tOther float64
		if relay == nil {
			tOther = CapabilityTime(k, x)
		} else {
			tOther = relay.Time(x)
		}
		m := 1.0 // a relay that does not act at x is after the limiter
		if !math.IsInf(tOther, 1) {
			if tOther <= 0 {
				m = -1 // an instantaneous relay is never after the limiter
			} else {
				m = (tOther - tl) / tOther
			}
		}
		if !seen || m < c.Margin {
			seen = true
			c.Margin, c.WorstX, c.Setting, c.Limit = m, x, tl, tOther
		}
	}
	if !seen {
		if relay != nil {
			// The limiter does not time anywhere in the range: nothing
			// for the relay to come after (the limiter's own check fails).
			c.Status, c.Margin = StatusPass, 1
			return
		}
		// The limiter does not act anywhere in the range the capability
		// curve covers: it does not protect the winding. The margin is
		// how far its pickup lies above the range's top, negative.
		c.Status, c.Kind, c.Margin = StatusFail, MarginPU, to-pick
		c.WorstX, c.Setting, c.Limit = pick, math.Inf(1), CapabilityTime(k, to)
		return
	}
	c.Status = StatusFail
	if c.Margin > 0 {
		c.Status = StatusPass
	}
}
