package ingest

import (
	"errors"
	"fmt"
	"math"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/report"
)

// marginLimit maps the margin alarms to the engine's limits.
var marginLimit = [...]limits.Limit{
	alarm.Armature: limits.LimitArmature, alarm.Field: limits.LimitField,
	alarm.Stability: limits.LimitStability, alarm.EndRegion: limits.LimitEndRegion,
	alarm.PrimeMover: limits.LimitPrimeMover, alarm.VoltsPerHertz: limits.LimitVoltsPerHertz,
	alarm.UEL: limits.LimitUEL,
}

// quantity returns what alarm kind k of the unit compares with its
// thresholds, from the latest evaluation; NaN when there is nothing to
// compare (no end-region curve, no field measurement). A bound missing
// at this active power counts as a margin of -1: past the limit.
func (u *Unit) quantity(k alarm.Kind) float64 {
	e := &u.eval
	switch {
	case k <= alarm.VoltsPerHertz || k == alarm.UEL:
		l := marginLimit[k]
		if m := e.Margins[l]; m.OK {
			return m.V
		}
		if !e.Feasible && e.Infeasible == l {
			return -1
		}
		return math.NaN()
	case k == alarm.ArmatureThermal:
		return u.armature.Used(limits.ArmatureK)
	case k == alarm.FieldThermal:
		return u.field.Used(limits.FieldK)
	case k == alarm.VoltageFrequencyZone:
		return float64(e.Zone) // 0 zone A, 1 zone B, 2 outside
	case k == alarm.FieldCurrentMismatch:
		s := &u.latest
		if !s.HasFieldA || s.Quality != QualityGood || !(e.IfdModel > 0) {
			return math.NaN()
		}
		return math.Abs(u.cfg.Base.FieldPU(s.FieldA)-e.IfdModel) / e.IfdModel
	}
	return math.NaN()
}

// stepAlarms advances every sample-driven alarm to sample time t. u.mu
// must be held.
func (u *Unit) stepAlarms(t int64, s *Store) {
	for k := alarm.Kind(0); k < alarm.NumKinds; k++ {
		x := u.quantity(k)
		if k == alarm.StaleTelemetry {
			x = 0 // a sample just arrived
		}
		set := &u.cfg.Alarms[k]
		m := &u.alarms[k]
		if m.Quiet(x, set, alarm.Rising(k)) {
			continue
		}
		if prev, changed := m.Step(t, x, set, alarm.Rising(k)); changed {
			s.publishLevel(u, k, prev, time.Unix(0, t), x, 0)
		}
	}
}

// publishLevel reports a level change of kind k. u.mu must be held.
func (s *Store) publishLevel(u *Unit, k alarm.Kind, prev alarm.Level, at time.Time, x, ageS float64) {
	m := &u.alarms[k]
	s.transitions[k][m.Level].Add(1)
	if !s.hub.Watched() {
		return // the sentence and the operating point are for watchers only
	}
	set := &u.cfg.Alarms[k]
	thr := set.Warning
	if l := max(m.Level, prev); l == alarm.Critical {
		thr = set.Critical
	}
	ctx := u.context()
	ctx.AgeS = ageS
	ev := u.event(k, alarm.LevelChanged, at, ageS)
	ev.Prev, ev.Value, ev.Threshold = prev, x, thr
	ctx.LimitMvar = ev.LimitAt
	ev.Message = alarm.Message(u.cfg.ID, k, m.Level, prev, x, &ctx)
	s.hub.Publish(ev)
}

// shelvedUntil is the end of m's shelf, or zero when it is not shelved.
func shelvedUntil(m *alarm.Machine) time.Time {
	if m.ShelvedUntil == 0 {
		return time.Time{}
	}
	return time.Unix(0, m.ShelvedUntil)
}

// engineering returns what alarm kind k watches and the limit it is held
// against, in engineering units, with their unit. u.mu must be held.
func (u *Unit) engineering(k alarm.Kind, ageS float64) (actual, limit float64, units string) {
	e, b, smp := &u.eval, &u.cfg.Base, &u.latest
	mvar := func(x limits.Bound) float64 {
		if !x.OK {
			return math.NaN()
		}
		return b.PowerMW(x.V)
	}
	switch k {
	case alarm.Armature:
		return e.I * b.CurrentA(), e.IMax * b.CurrentA(), "A"
	case alarm.Field:
		return b.FieldA(e.FieldCurrent), b.FieldA(e.IfdMax), "A"
	case alarm.Stability:
		return smp.QMvar, mvar(e.Practical), "Mvar"
	case alarm.EndRegion:
		return smp.QMvar, mvar(e.EndRegion), "Mvar"
	case alarm.PrimeMover:
		pm := u.cfg.PrimeMover
		if smp.PMW-pm.PMinMW < pm.PMaxMW-smp.PMW {
			return smp.PMW, pm.PMinMW, "MW" // the nearer end: p_min
		}
		return smp.PMW, pm.PMaxMW, "MW"
	case alarm.UEL:
		return smp.QMvar, mvar(e.UEL), "Mvar"
	case alarm.VoltsPerHertz:
		return e.VPerHz, limits.VoltsPerHertzLimit, "pu"
	case alarm.ArmatureThermal:
		return u.armature.H, limits.ArmatureK, "s"
	case alarm.FieldThermal:
		return u.field.H, limits.FieldK, "s"
	case alarm.VoltageFrequencyZone:
		edge := 1.05
		if smp.VKV < u.cfg.Rating.KV {
			edge = 0.95
		}
		return smp.VKV, edge * u.cfg.Rating.KV, "kV"
	case alarm.StaleTelemetry:
		return ageS, u.cfg.Alarms[k].Warning, "s"
	case alarm.FieldCurrentMismatch:
		return smp.FieldA, b.FieldA(e.IfdModel), "A"
	}
	return math.NaN(), math.NaN(), ""
}

// event returns the event skeleton of unit u's alarm k with its present
// state. u.mu must be held.
func (u *Unit) event(k alarm.Kind, change alarm.Change, at time.Time, ageS float64) alarm.Event {
	m := &u.alarms[k]
	ev := alarm.Event{Unit: u.cfg.ID, Site: u.cfg.Site, Kind: k, Change: change, Level: m.Level, Prev: m.Level,
		Time: at, Value: m.Value, Acknowledged: m.Acknowledged, Shelved: shelvedUntil(m)}
	if u.has || k == alarm.StaleTelemetry {
		ev.Actual, ev.LimitAt, ev.Units = u.engineering(k, ageS)
	}
	return ev
}

// context returns the operating point behind the unit's alarms. u.mu
// must be held.
func (u *Unit) context() alarm.Context {
	var c alarm.Context
	if !u.has {
		return c
	}
	u.complete()
	s := &u.latest
	e := report.New(u.cfg, u.pt, &u.eval)
	c = alarm.Context{PMW: s.PMW, QMvar: s.QMvar, VKV: s.VKV, QMaxMvar: e.QMaxMvar, QMinMvar: e.QMinMvar,
		PMaxMW: u.cfg.PrimeMover.PMaxMW, PMinMW: u.cfg.PrimeMover.PMinMW, IfdMeasuredA: e.FieldCurrentMeasuredA, Zone: e.Zone, VPerHzPU: u.eval.VPerHz}
	if e.QMaxLimit != nil {
		c.QMaxLimit = *e.QMaxLimit
	}
	if e.QMinLimit != nil {
		c.QMinLimit = *e.QMinLimit
	}
	if e.FieldCurrentModelA != nil {
		c.IfdModelA = *e.FieldCurrentModelA
	}
	return c
}

// Sweep runs the wall-clock alarms at time now: stale telemetry for
// every unit (a unit that never reported counts from the store's start),
// and the expiry of shelves. The server calls it about once a second.
func (s *Store) Sweep(now time.Time) {
	t := now.UnixNano()
	for _, u := range s.Units() {
		u.mu.Lock()
		last := s.startNS
		if u.has {
			last = u.recvNS
		}
		age := float64(t-last) / 1e9
		m := &u.alarms[alarm.StaleTelemetry]
		if prev, changed := m.Step(t, age, &u.cfg.Alarms[alarm.StaleTelemetry], true); changed {
			s.publishLevel(u, alarm.StaleTelemetry, prev, now, age, age)
		}
		for k := range u.alarms {
			if m := &u.alarms[k]; m.ShelvedUntil != 0 && m.ShelvedUntil <= t {
				m.ShelvedUntil = 0
				ev := u.event(alarm.Kind(k), alarm.Unshelved, now, age)
				ev.Message = fmt.Sprintf("%s: %s alarm no longer shelved (shelf expired).", u.cfg.ID, alarm.Kind(k))
				s.hub.Publish(ev)
			}
		}
		u.mu.Unlock()
	}
}

// age is the time since unit u's latest sample (or the store's start),
// in seconds, at wall-clock now. u.mu must be held.
func (s *Store) age(u *Unit, now time.Time) float64 {
	last := s.startNS
	if u.has {
		last = u.recvNS
	}
	return float64(now.UnixNano()-last) / 1e9
}

// Errors of the operator actions.
var (
	ErrUnknownUnit = errors.New("unknown unit")
	ErrNotActive   = errors.New("the alarm is not active")
)

// Acknowledge records that an operator has seen unit id's alarm k.
func (s *Store) Acknowledge(id string, k alarm.Kind, now time.Time, by string) error {
	u := s.Unit(id)
	if u == nil {
		return fmt.Errorf("%w %q", ErrUnknownUnit, id)
	}
	u.mu.Lock()
	defer u.mu.Unlock()
	m := &u.alarms[k]
	if m.Level == alarm.Normal {
		return fmt.Errorf("%s %s: %w", id, k, ErrNotActive)
	}
	if m.Acknowledged {
		return nil
	}
	m.Acknowledged = true
	ev := u.event(k, alarm.Acknowledged, now, s.age(u, now))
	ev.Message = fmt.Sprintf("%s: %s alarm (%s) acknowledged%s.", id, k, m.Level, byWhom(by))
	s.hub.Publish(ev)
	return nil
}

// Shelve suppresses unit id's alarm k until the wall-clock time until;
// a zero until lifts the shelf.
func (s *Store) Shelve(id string, k alarm.Kind, until, now time.Time, by string) error {
	u := s.Unit(id)
	if u == nil {
		return fmt.Errorf("%w %q", ErrUnknownUnit, id)
	}
	u.mu.Lock()
	defer u.mu.Unlock()
	m := &u.alarms[k]
	if until.IsZero() {
		if m.ShelvedUntil == 0 {
			return nil
		}
		m.ShelvedUntil = 0
	} else {
		m.ShelvedUntil = until.UnixNano()
	}
	ev := u.event(k, alarm.Shelved, now, s.age(u, now))
	if until.IsZero() {
		ev.Change = alarm.Unshelved
		ev.Message = fmt.Sprintf("%s: %s alarm unshelved%s.", id, k, byWhom(by))
	} else {
		ev.Message = fmt.Sprintf("%s: %s alarm shelved until %s%s.", id, k, until.UTC().Format(time.RFC3339), byWhom(by))
	}
	s.hub.Publish(ev)
	return nil
}

func byWhom(by string) string {
	if by == "" {
		return ""
	}
	return " by " + by
}

// Active returns the alarms above normal as events describing their
// present state, in fleet order.
func (s *Store) Active() []alarm.Event {
	var out []alarm.Event
	for _, u := range s.Units() {
		out = s.appendActive(out, u)
	}
	return out
}

// ActiveOf returns unit id's alarms above normal, like Active; nil for an
// unknown unit.
func (s *Store) ActiveOf(id string) []alarm.Event {
	u := s.Unit(id)
	if u == nil {
		return nil
	}
	return s.appendActive(nil, u)
}

func (s *Store) appendActive(out []alarm.Event, u *Unit) []alarm.Event {
	u.mu.Lock()
	defer u.mu.Unlock()
	for k := range u.alarms {
		m := &u.alarms[k]
		if m.Level == alarm.Normal {
			continue
		}
		ctx := u.context()
		ev := u.event(alarm.Kind(k), alarm.LevelChanged, time.Unix(0, m.Since), s.age(u, s.opts.Now()))
		ctx.LimitMvar = ev.LimitAt
		ev.Message = alarm.Message(u.cfg.ID, alarm.Kind(k), m.Level, m.Level, m.Value, &ctx)
		out = append(out, ev)
	}
	return out
}
