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
}

// quantity returns what alarm kind k of the unit compares with its
// thresholds, from the latest evaluation; NaN when there is nothing to
// compare (no end-region curve, no field measurement). A bound missing
// at this active power counts as a margin of -1: past the limit.
func (u *Unit) quantity(k alarm.Kind) float64 {
	e := &u.eval
	switch {
	case k <= alarm.VoltsPerHertz:
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
	set := &u.cfg.Alarms[k]
	thr := set.Warning
	if l := max(m.Level, prev); l == alarm.Critical {
		thr = set.Critical
	}
	ctx := u.context()
	ctx.AgeS = ageS
	s.hub.Publish(alarm.Event{
		Unit: u.cfg.ID, Site: u.cfg.Site, Kind: k, Change: alarm.LevelChanged,
		Level: m.Level, Prev: prev, Time: at, Value: x, Threshold: thr,
		Shelved: shelvedUntil(m), Acknowledged: m.Acknowledged,
		Message: alarm.Message(u.cfg.ID, k, m.Level, prev, x, &ctx),
	})
}

// shelvedUntil is the end of m's shelf, or zero when it is not shelved.
func shelvedUntil(m *alarm.Machine) time.Time {
	if m.ShelvedUntil == 0 {
		return time.Time{}
	}
	return time.Unix(0, m.ShelvedUntil)
}

// context returns the operating point behind the unit's alarms. u.mu
// must be held.
func (u *Unit) context() alarm.Context {
	var c alarm.Context
	if !u.has {
		return c
	}
	s := &u.latest
	pt := report.Point(u.cfg, s.PMW, s.QMvar, s.VKV, s.FieldA, s.HasFieldA, s.FrequencyHz, s.HasFreq, s.Coolant, s.HasCoolant)
	e := report.New(u.cfg, pt, &u.eval)
	c = alarm.Context{PMW: s.PMW, QMvar: s.QMvar, VKV: s.VKV, QMaxMvar: e.QMaxMvar, QMinMvar: e.QMinMvar,
		PMaxMW: u.cfg.PrimeMover.PMaxMW, IfdMeasuredA: e.FieldCurrentMeasuredA, Zone: e.Zone, VPerHzPU: u.eval.VPerHz}
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
				s.hub.Publish(alarm.Event{Unit: u.cfg.ID, Site: u.cfg.Site, Kind: alarm.Kind(k), Change: alarm.Unshelved,
					Level: m.Level, Prev: m.Level, Time: now, Value: m.Value, Acknowledged: m.Acknowledged,
					Message: fmt.Sprintf("%s: %s alarm no longer shelved (shelf expired).", u.cfg.ID, alarm.Kind(k))})
			}
		}
		u.mu.Unlock()
	}
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
	s.hub.Publish(alarm.Event{Unit: id, Site: u.cfg.Site, Kind: k, Change: alarm.Acknowledged, Level: m.Level, Prev: m.Level,
		Acknowledged: true, Shelved: shelvedUntil(m), Time: now, Value: m.Value, Message: fmt.Sprintf("%s: %s alarm (%s) acknowledged%s.", id, k, m.Level, byWhom(by))})
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
	ev := alarm.Event{Unit: id, Site: u.cfg.Site, Kind: k, Level: m.Level, Prev: m.Level, Time: now, Value: m.Value,
		Acknowledged: m.Acknowledged}
	if until.IsZero() {
		if m.ShelvedUntil == 0 {
			return nil
		}
		m.ShelvedUntil = 0
		ev.Change = alarm.Unshelved
		ev.Message = fmt.Sprintf("%s: %s alarm unshelved%s.", id, k, byWhom(by))
	} else {
		m.ShelvedUntil = until.UnixNano()
		ev.Change, ev.Shelved = alarm.Shelved, until
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
		u.mu.Lock()
		for k := range u.alarms {
			m := &u.alarms[k]
			if m.Level == alarm.Normal {
				continue
			}
			ctx := u.context()
			ev := alarm.Event{Unit: u.cfg.ID, Site: u.cfg.Site, Kind: alarm.Kind(k), Change: alarm.LevelChanged,
				Level: m.Level, Prev: m.Level, Time: time.Unix(0, m.Since), Value: m.Value,
				Message: alarm.Message(u.cfg.ID, alarm.Kind(k), m.Level, m.Level, m.Value, &ctx), Acknowledged: m.Acknowledged}
			if m.ShelvedUntil != 0 {
				ev.Shelved = time.Unix(0, m.ShelvedUntil)
			}
			out = append(out, ev)
		}
		u.mu.Unlock()
	}
	return out
}
