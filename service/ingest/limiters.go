package ingest

import (
	"math"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

// The regulator's limiter timers, live (coordination.md, "Live"): the
// OEL's and SCL's inverse-time delays used, advanced on the samples' own
// timestamps like the thermal accumulators, each holding the previous
// sample's current until the next; and the V/Hz limiter's margin.

// limiterState is one unit's limiter timers.
type limiterState struct {
	cfg      *fleet.Unit // the configuration the curves were taken from
	oelCurve *limits.InverseTime
	sclCurve *limits.InverseTime
	oel, scl limits.LimiterTimer
	xOEL     float64 // field current of the latest sample, pu of the rated field current
	xSCL     float64 // armature current of the latest sample, pu of the rated current
}

// curves takes the limiter curves of cfg when it changed (at start and
// after a reload), so that the per-sample path allocates nothing.
func (l *limiterState) curves(cfg *fleet.Unit) {
	if l.cfg == cfg {
		return
	}
	l.cfg = cfg
	l.oelCurve, l.sclCurve = cfg.Limiters.OEL.Curve(), cfg.Limiters.SCL.Curve()
}

// advanceLimiters advances the timers by dt seconds with the currents
// the thermal memory holds (hArm, hField: the previous sample's, capped,
// and not taken from a suspect sample until a following one confirms
// it), so that both run on the same rule: on sample time, and on the
// wall clock while the unit is silent (Sweep). u.mu must be held.
func (u *Unit) advanceLimiters(dt float64) {
	l := &u.lim
	l.curves(u.cfg)
	if l.oelCurve == nil && l.sclCurve == nil {
		return
	}
	xOEL, xSCL := u.limiterCurrents(u.hArm, u.hField)
	l.oel.Advance(l.oelCurve, xOEL, dt)
	l.scl.Advance(l.sclCurve, xSCL, dt)
}

// limiterCurrents converts the thermal memory's per-unit currents
// (against the ratings at the coolant of the latest evaluation) to what
// the limiters act on: the field current in pu of the rated field
// current as set, the armature current in pu of rated. u.mu must be held.
func (u *Unit) limiterCurrents(xArm, xField float64) (xOEL, xSCL float64) {
	if r := u.cfg.Model.RatedFieldCurrent(); r > 0 {
		xOEL = xField * u.eval.IfdMax / r
	}
	return xOEL, xArm * u.eval.IMax
}

// holdLimiters takes the latest evaluation's currents for the limiters'
// present state (time to action, the alarms). u.mu must be held.
func (u *Unit) holdLimiters() {
	u.lim.curves(u.cfg)
	u.lim.xOEL, u.lim.xSCL = u.limiterCurrents(u.xArm, u.xField)
}

// LimiterView is the live state of a unit's limiters.
type LimiterView struct {
	OEL, SCL LimiterTimerView
	// VHzMargin is 1 - (v/f)/setpoint of the V/Hz limiter; OK false
	// without a limiter or a sample.
	VHzMargin limits.Bound
}

// LimiterTimerView is one inverse-time limiter's state.
type LimiterTimerView struct {
	Configured bool    // the fleet file gives this limiter
	X          float64 // the current it acts on, pu of its rating
	Used       float64 // fraction of its inverse-time delay used, 1 is acting
	Timing     bool    // the current is above its pickup
	ToActionS  float64 // time to action at the present current, s; meaningful when Timing
}

// limiterView returns the limiters' state. u.mu must be held.
func (u *Unit) limiterView() LimiterView {
	l := &u.lim
	l.curves(u.cfg)
	var v LimiterView
	one := func(c *limits.InverseTime, t limits.LimiterTimer, x float64) LimiterTimerView {
		if c == nil {
			return LimiterTimerView{}
		}
		tv := LimiterTimerView{Configured: true, X: x, Used: t.Used}
		tv.ToActionS, tv.Timing = t.TimeToAction(c, x)
		return tv
	}
	v.OEL = one(l.oelCurve, l.oel, l.xOEL)
	v.SCL = one(l.sclCurve, l.scl, l.xSCL)
	if vl := u.cfg.Limiters.VHzLimiter; vl != nil && u.has {
		v.VHzMargin = limits.Bound{V: limits.VHzLimiterMargin(u.pt.V, u.pt.F, vl.SetpointPU), OK: true}
	}
	return v
}

// limiterIdleS is the time to action an alarm sees while a limiter is
// configured but not timing (its current at or below the pickup): a day,
// far beyond any threshold, and finite so that the alarm state stays
// writable to the state file.
const limiterIdleS = 86400

// limiterQuantity is what the OEL and SCL alarms compare with their
// thresholds: the time to action, s; NaN without the limiter or a sample.
// u.mu must be held.
func (u *Unit) limiterQuantity(k alarm.Kind) float64 {
	l := &u.lim
	l.curves(u.cfg)
	c, t, x := l.oelCurve, l.oel, l.xOEL
	if k == alarm.SCLTimer {
		c, t, x = l.sclCurve, l.scl, l.xSCL
	}
	if c == nil || !u.has || u.suspect {
		// Nothing to watch, or a suspect sample (the first after a gap,
		// or a jump): the alarm holds its level until a sample confirms.
		return math.NaN()
	}
	s, timing := t.TimeToAction(c, x)
	if !timing {
		return limiterIdleS
	}
	return s
}
