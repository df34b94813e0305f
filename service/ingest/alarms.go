package ingest

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/service/report"
)

// quantity returns what alarm kind k of the unit compares with its
// thresholds, from the latest evaluation; NaN when there is nothing to
// compare (no end-region curve, no field measurement). A bound missing
// at this active power counts as a margin of -1: past the limit.
func (u *Unit) quantity(k alarm.Kind) float64 {
	e := &u.eval
	if l := report.LimitOfAlarm(k); l != limits.NoLimit {
		if m := e.Margins[l]; m.OK {
			return m.V
		}
		if !e.Feasible && e.Infeasible == l {
			return -1
		}
		return math.NaN()
	}
	switch {
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
	case k == alarm.OELTimer || k == alarm.SCLTimer:
		return u.limiterQuantity(k)
	}
	return math.NaN()
}

// stepAlarms advances every sample-driven alarm to sample time t: at a
// sample, or from Sweep (sweep true) at the sample time the wall clock
// has reached since the latest sample, with the same quantities, so that
// on- and off-delays and the thermal alarms go on while telemetry
// pauses. u.mu must be held.
//
// An alarm at rest whose quantity stays on the quiet side of its warning
// threshold is not stepped: its step would change nothing (Machine.Quiet).
// The per-sample path decides that from u.rest, a copy kept beside the
// unit's hot state, without touching the machine or its setting, which
// lie in colder memory; TestRestSkipsOnlyQuietSteps holds it to the
// machines stepped at every sample.
func (u *Unit) stepAlarms(t int64, s *Store, sweep bool) {
	for k := alarm.Kind(0); k < alarm.NumKinds; k++ {
		x := u.quantity(k)
		if k == alarm.StaleTelemetry {
			if sweep {
				continue // the wall clock's own alarm
			}
			x = 0 // a sample just arrived
		}
		if u.rest.quiet(k, x) {
			continue
		}
		set := &u.cfg.Alarms[k]
		m := &u.alarms[k]
		if !m.Quiet(x, set, alarm.Rising(k)) {
			if prev, changed := m.Step(t, x, set, alarm.Rising(k)); changed {
				s.publishLevel(u, k, prev, time.Unix(0, t), x, 0)
			}
		}
		u.rest.note(k, m, set)
	}
}

// restCache says which of a unit's alarms are at rest (normal, no level
// rising) and up to where their quantity leaves them so: the warning
// threshold, or for a disabled alarm anything. A kind whose bit is clear
// is stepped in full; the zero value, everything stepped, is always
// right, so whatever changes a machine or a setting other than
// stepAlarms clears the cache (forget).
type restCache struct {
	bits  uint16 // bit k: kind k is at rest and bound[k] holds
	bound [alarm.NumKinds]float64
}

// quiet reports whether a step of kind k with quantity x may be left
// out: the kind is at rest and x is strictly on the quiet side of its
// bound, or NaN (nothing to compare: a step holds the level and changes
// nothing, and a disabled alarm at rest is not stepped at all).
func (r *restCache) quiet(k alarm.Kind, x float64) bool {
	if r.bits&(1<<k) == 0 {
		return false
	}
	if alarm.Rising(k) {
		return !(x >= r.bound[k])
	}
	return !(x <= r.bound[k])
}

// note records whether machine m of kind k, with setting set, is at
// rest after its step.
func (r *restCache) note(k alarm.Kind, m *alarm.Machine, set *alarm.Setting) {
	if m.Level != alarm.Normal || m.Raising[0] || m.Raising[1] {
		r.bits &^= 1 << k
		return
	}
	b := set.Warning
	if set.Disabled {
		b = math.Inf(1) // Quiet is true for any quantity
		if !alarm.Rising(k) {
			b = math.Inf(-1)
		}
	}
	r.bits |= 1 << k
	r.bound[k] = b
}

// forget empties the cache: every kind is stepped at the next sample.
func (r *restCache) forget() { r.bits = 0 }

// publishLevel reports a level change of kind k. u.mu must be held.
func (s *Store) publishLevel(u *Unit, k alarm.Kind, prev alarm.Level, at time.Time, x, ageS float64) {
	m := &u.alarms[k]
	s.transitions[k][m.Level].Add(1)
	if m.Level == alarm.Normal {
		u.raised[k] = ""
	}
	if !s.hub.Watched() && s.opts.Journal == nil {
		return // the sentence and the operating point are for watchers and the journal only
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
	if m.Level > prev {
		u.raised[k] = ev.Message // kept while the off-delay holds the alarm
	}
	s.publish(ev)
}

// publish sends ev to the watchers and records it in the journal.
func (s *Store) publish(ev alarm.Event) {
	s.record(&ev)
	s.hub.Publish(ev)
}

// record writes ev to the journal, if there is one.
func (s *Store) record(ev *alarm.Event) {
	if s.opts.Journal == nil {
		return
	}
	e := journal.Entry{Time: ev.Time, Unit: ev.Unit, Site: ev.Site, Limit: ev.Kind.String(), Change: ev.Change.String(),
		Level: ev.Level.String(), Prev: ev.Prev.String(), Value: journal.Num(ev.Value), Actual: journal.Num(ev.Actual),
		LimitAt: journal.Num(ev.LimitAt), Units: ev.Units, Message: ev.Message, Operator: ev.Operator}
	if ev.Change == alarm.LevelChanged {
		e.Threshold = journal.Num(ev.Threshold)
	}
	if ev.Removed {
		e.Change = journal.ChangeRemoved
	}
	s.appendJournal(e)
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
	case alarm.OELTimer, alarm.SCLTimer:
		return u.limiterQuantity(k), 0, "s"
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
		c.NoData = true
		return c
	}
	u.complete()
	s := &u.latest
	e := report.New(u.cfg, u.pt, &u.eval) // the point as evaluated
	c = alarm.Context{PMW: s.PMW, QMvar: s.QMvar, VKV: s.VKV, QMaxMvar: e.QMaxMvar, QMinMvar: e.QMinMvar,
		PMaxMW: u.cfg.PrimeMover.PMaxMW, PMinMW: u.cfg.PrimeMover.PMinMW, IfdMeasuredA: e.FieldCurrentMeasuredA, Zone: e.Zone, VPerHzPU: u.eval.VPerHz,
		OELXPU: u.lim.xOEL, SCLXPU: u.lim.xSCL}
	if e.QMaxLimit != nil {
		c.QMaxLimit = *e.QMaxLimit
	}
	if e.QMinLimit != nil {
		c.QMinLimit = *e.QMinLimit
	}
	if e.FieldCurrentModelA != nil {
		c.IfdModelA = *e.FieldCurrentModelA
	}
	if s.HasFieldA && c.IfdMeasuredA == nil {
		ifd := s.FieldA // measured, though not used while the mismatch alarm is active
		c.IfdMeasuredA = &ifd
	}
	return c
}

// Sweep runs the wall-clock supervision at time now, for every unit:
// stale telemetry (a unit that never reported counts from the store's
// start); the expiry of shelves; and, while telemetry pauses, the
// thermal accumulators and the sample-driven alarms advance from the
// latest sample by the wall clock, holding its values (the excursion is
// assumed to continue: a winding above its rating keeps heating, one
// below cools) until the stale-telemetry warning threshold, beyond which
// the unit is stale and its thermal state unknown. The server calls it
// about once a second.
func (s *Store) Sweep(now time.Time) {
	t := now.UnixNano()
	for _, u := range s.Units() {
		u.mu.Lock()
		last := s.startNS
		if u.has {
			last = u.recvNS
		}
		age := float64(t-last) / 1e9
		staleSet := &u.cfg.Alarms[alarm.StaleTelemetry]
		m := &u.alarms[alarm.StaleTelemetry]
		if prev, changed := m.Step(t, age, staleSet, true); changed {
			s.publishLevel(u, alarm.StaleTelemetry, prev, now, age, age)
		}
		u.rest.forget()
		if u.has {
			staleS := staleSet.Warning
			if !(staleS > 0) {
				staleS = 30
			}
			horizon := u.lastNS + int64(staleS*1e9)
			tEq := min(u.lastNS+(t-u.recvNS), horizon)
			if tEq > u.thermNS && !u.stale {
				u.advance(tEq - u.thermNS)
				u.thermNS = tEq
			}
			if tEq > u.lastNS && !u.stale {
				u.stepAlarms(tEq, s, true)
			}
			u.stale = age >= staleS
		}
		for k := range u.alarms {
			if m := &u.alarms[k]; m.ShelvedUntil != 0 && m.ShelvedUntil <= t {
				m.ShelvedUntil = 0
				ev := u.event(alarm.Kind(k), alarm.Unshelved, now, age)
				ev.Message = fmt.Sprintf("%s: %s alarm no longer shelved (shelf expired).", u.cfg.ID, alarm.Kind(k))
				s.publish(ev)
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
	ErrUnknownUnit   = errors.New("unknown unit")
	ErrNotActive     = errors.New("the alarm is not active")
	ErrNoOperator    = errors.New("an operator name is required")
	ErrUnknownSample = errors.New("no such recent sample")
)

// Acknowledge records that operator by has seen unit id's alarm k.
func (s *Store) Acknowledge(id string, k alarm.Kind, now time.Time, by string) error {
	if strings.TrimSpace(by) == "" {
		return ErrNoOperator
	}
	u := s.Unit(id)
	if u == nil {
		return fmt.Errorf("%w %q", ErrUnknownUnit, ClipID(id))
	}
	defer s.syncJournal()
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
	ev.Operator = by
	ev.Message = fmt.Sprintf("%s: %s alarm (%s) acknowledged%s.", id, k, m.Level, byWhom(by))
	s.publish(ev)
	return nil
}

// syncJournal makes the journal's entries durable (after an operator
// action, which its caller expects recorded).
func (s *Store) syncJournal() {
	if j := s.opts.Journal; j != nil {
		_ = j.Sync()
	}
}

// Shelve suppresses unit id's alarm k until the wall-clock time until;
// a zero until lifts the shelf. by names the operator.
func (s *Store) Shelve(id string, k alarm.Kind, until, now time.Time, by string) error {
	if strings.TrimSpace(by) == "" {
		return ErrNoOperator
	}
	u := s.Unit(id)
	if u == nil {
		return fmt.Errorf("%w %q", ErrUnknownUnit, ClipID(id))
	}
	defer s.syncJournal()
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
	ev.Operator = by
	if until.IsZero() {
		ev.Change = alarm.Unshelved
		ev.Message = fmt.Sprintf("%s: %s alarm unshelved%s.", id, k, byWhom(by))
	} else {
		ev.Message = fmt.Sprintf("%s: %s alarm shelved until %s%s.", id, k, until.UTC().Format(time.RFC3339), byWhom(by))
	}
	s.publish(ev)
	return nil
}

// ResetThermal clears unit id's thermal accumulators (winding
// "armature", "field", or "" for both), for an operator who knows the
// heating they hold is wrong; recorded in the journal with who and why.
func (s *Store) ResetThermal(id, winding string, now time.Time, by, reason string) error {
	if strings.TrimSpace(by) == "" {
		return ErrNoOperator
	}
	if winding != "" && winding != "armature" && winding != "field" {
		return fmt.Errorf("winding %q: give armature, field or nothing for both", winding)
	}
	u := s.Unit(id)
	if u == nil {
		return fmt.Errorf("%w %q", ErrUnknownUnit, id)
	}
	u.mu.Lock()
	a0, f0 := u.armature.H, u.field.H
	if winding != "field" {
		u.armature.H = 0
	}
	if winding != "armature" {
		u.field.H = 0
	}
	what := "both windings'"
	if winding != "" {
		what = "the " + winding + " winding's"
	}
	s.recordAction(u, journal.ChangeReset, winding, now, by, fmt.Sprintf("%s: %s short-time thermal memory cleared (armature %.1f s, field %.1f s of heating before)%s%s.",
		id, what, a0, f0, byWhom(by), because(reason)))
	u.mu.Unlock()
	s.syncJournal()
	return nil
}

// DiscardSample removes the heating that unit id's sample at time at
// held into its thermal accumulators (one of the last 16 samples), and
// stops it heating further when it is the latest; recorded in the
// journal. The sample stays the unit's latest for the margins.
func (s *Store) DiscardSample(id string, at, now time.Time, by, reason string) error {
	if strings.TrimSpace(by) == "" {
		return ErrNoOperator
	}
	u := s.Unit(id)
	if u == nil {
		return fmt.Errorf("%w %q", ErrUnknownUnit, id)
	}
	t := at.UnixNano()
	u.mu.Lock()
	var h *heatStep
	for i := range u.heat {
		if u.heat[i].discardable && u.heat[i].t == t {
			h = &u.heat[i]
		}
	}
	if h == nil {
		u.mu.Unlock()
		return fmt.Errorf("%w: unit %q has no sample at %s among its last %d", ErrUnknownSample, id, at.UTC().Format(time.RFC3339Nano), heatSize)
	}
	u.armature.H = max(0, u.armature.H-h.arm)
	u.field.H = max(0, u.field.H-h.field)
	msg := fmt.Sprintf("%s: the thermal effect of the sample at %s discarded (armature %.1f s, field %.1f s of heating)%s%s.",
		id, at.UTC().Format(time.RFC3339Nano), h.arm, h.field, byWhom(by), because(reason))
	*h = heatStep{t: t}
	if t == u.lastNS {
		u.hArm, u.hField = min(u.hArm, 1), min(u.hField, 1) // it heats no further
	}
	s.recordAction(u, journal.ChangeDiscard, "", now, by, msg)
	u.mu.Unlock()
	s.syncJournal()
	return nil
}

// recordAction journals an operator's change to unit u's state. u.mu
// must be held.
func (s *Store) recordAction(u *Unit, change, limit string, now time.Time, by, msg string) {
	s.appendJournal(journal.Entry{Time: now, Unit: u.cfg.ID, Site: u.cfg.Site, Limit: limit, Change: change, Message: msg, Operator: by})
}

func because(reason string) string {
	if strings.TrimSpace(reason) == "" {
		return ""
	}
	return " (" + reason + ")"
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
		age := s.age(u, s.opts.Now())
		ev := u.event(alarm.Kind(k), alarm.LevelChanged, time.Unix(0, m.Since), age)
		if m.Clearing[m.Level-1] && u.raised[k] != "" {
			ev.Message = u.raised[k] // held by its off-delay: what raised it
		} else {
			ctx := u.context()
			ctx.AgeS = age
			ctx.LimitMvar = ev.LimitAt
			ev.Message = alarm.Message(u.cfg.ID, alarm.Kind(k), m.Level, m.Level, m.Value, &ctx)
		}
		out = append(out, ev)
	}
	return out
}
