// Package ingest holds the live state of the fleet: for every unit, its
// latest accepted sample, the evaluation of that sample against the
// unit's envelope, the short-time thermal accumulators and the memory of
// recent timestamps that makes a resent sample a harmless duplicate.
//
// Ingest never holds a global lock: the fleet is an immutable snapshot
// behind an atomic pointer, replaced whole on reload, and each unit has
// its own mutex. Samples of different units proceed in parallel.
package ingest

import (
	"fmt"
	"math"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/service/report"
)

// Quality is the quality flag a sample carries from the plant.
type Quality uint8

const (
	QualityGood         Quality = iota // also what an unspecified quality counts as
	QualityQuestionable                // used, and flagged
	QualityInvalid                     // rejected
)

// Sample is one measurement of one unit, in engineering units.
type Sample struct {
	UnitID string
	Time   time.Time // zero when the sample carries none

	PMW, QMvar, VKV float64

	FieldA      float64
	HasFieldA   bool
	FrequencyHz float64
	HasFreq     bool
	Coolant     float64
	HasCoolant  bool

	Quality Quality
}

// UnknownUnitDetail is the detail of the rejection of a sample for unit
// id, which is not in the fleet: the one wording for it, so that a
// sample answered as for a missing unit (one a writer may not see, see
// package rpc) cannot be told from one by its words.
func UnknownUnitDetail(id string) string {
	return fmt.Sprintf("unit %q is not in the fleet file", ClipID(id))
}

// ClipID returns a unit id for an answer or a log line: at most 64
// bytes, cut at a character boundary and marked, so that a huge id is
// not echoed back whole.
func ClipID(id string) string {
	const max = 64
	if len(id) <= max {
		return id
	}
	cut := max
	for cut > 0 && id[cut]&0xC0 == 0x80 {
		cut--
	}
	return id[:cut] + "…"
}

// MaxShelve is the longest an operator may shelve an alarm for, on
// every path (gRPC and the pages).
const MaxShelve = 24 * time.Hour

// Result is what became of one sample.
type Result uint8

// The results, in the order of Counts. Every reason a sample is
// rejected is a Result of its own.
const (
	Accepted Result = iota
	Duplicate
	RejectUnknownUnit
	RejectNotFinite
	RejectOutOfRange
	RejectOutOfOrder
	RejectFuture
	RejectInvalidQuality
	RejectMissingTime
	RejectOutOfRangeTime   // before the horizon, or outside what a time in Unix nanoseconds can hold
	RejectImplausible      // outside what the machine can physically report (see fleet.Plausibility)
	RejectPermissionDenied // the caller may not push for the unit (access file)
	NumResults
)

var resultNames = [NumResults]string{
	"accepted", "duplicate", "unknown_unit", "not_finite", "out_of_range",
	"out_of_order", "future", "invalid_quality", "missing_time", "out_of_range_time", "implausible",
	"permission_denied",
}

// String returns the result's name as used in the metrics: "accepted",
// "duplicate", or the reject reason.
func (r Result) String() string {
	if r < NumResults {
		return resultNames[r]
	}
	return fmt.Sprintf("Result(%d)", uint8(r))
}

// Options tune ingest. The zero value takes the defaults.
type Options struct {
	// MaxFuture is how far ahead of the server clock a sample may be
	// stamped (clock skew between the plant and the server). Default
	// 5 s. A sample stamped ahead holds the unit's order only until the
	// clock reaches it: a later sample stamped after the moment it
	// arrived supersedes it, so one never locks out the real feed.
	MaxFuture time.Duration
	// Horizon is how far behind the server clock a sample may be
	// stamped. Default 7 days. Older history is evaluated with
	// genvelope replay --backfill, not pushed into the live state.
	Horizon time.Duration
	// MaxHold is the longest step, in sample time, over which the
	// thermal accumulators hold a sample's current: a longer gap counts
	// as MaxHold (what flowed beyond it is not known), and the first
	// sample after such a gap is suspect. Default 10 s.
	MaxHold time.Duration
	// RemovedGrace is how long the state of a unit removed by a reload
	// is kept, so that a unit removed by mistake and added again comes
	// back with its thermal memory. Default 1 hour.
	RemovedGrace time.Duration
	// Journal, when set, records every alarm transition and operator
	// action.
	Journal *journal.Journal
	// Now is the wall clock, for stale telemetry and shelving; default
	// time.Now.
	Now func() time.Time
}

// MaxThermalX caps the current (pu of the winding's continuous rating)
// a sample can hold into a thermal accumulator: one sample adds at most
// (MaxThermalX² − 1) × MaxHold seconds of heating (80 s with the
// defaults, against K = 37.5 s armature and 33.75 s field of IEEE
// C50.13), and only once a following sample has confirmed it (see
// fleet.Plausibility.StepMaxPU).
const MaxThermalX = 3.0

func (o Options) withDefaults() Options {
	if o.MaxFuture <= 0 {
		o.MaxFuture = 5 * time.Second
	}
	if o.Horizon <= 0 {
		o.Horizon = 7 * 24 * time.Hour
	}
	if o.MaxHold <= 0 {
		o.MaxHold = 10 * time.Second
	}
	if o.RemovedGrace <= 0 {
		o.RemovedGrace = time.Hour
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	return o
}

// Store is the live state of a fleet. It is safe for concurrent use.
type Store struct {
	opts    Options
	snap    atomic.Pointer[snapshot]
	counts  [NumResults]atomic.Uint64
	hub     *alarm.Hub
	startNS int64 // wall clock at start: the age of a unit that never reported

	// Alarm transitions by kind and level reached.
	transitions [alarm.NumKinds][3]atomic.Uint64

	replaceMu sync.Mutex             // one Replace at a time
	removed   map[string]removedUnit // units a reload removed, kept for RemovedGrace

	// logSeq is, with a durable log, the stream sequence of the message
	// being applied: the journal entries it makes carry it.
	logSeq atomic.Uint64
}

// SetLogSequence says which log message the store applies from now on
// (0: none), so that its journal entries carry it (journal.Entry.LogSeq).
// A durable log sets it around each message it applies; every change to
// the store then comes from that one goroutine.
func (s *Store) SetLogSequence(seq uint64) { s.logSeq.Store(seq) }

// SetStart sets the time from which a unit that never reported counts
// as silent (stale telemetry); default the store's creation. A durable
// log sets the stream's creation, the same on every replica. Call it
// before the store is used.
func (s *Store) SetStart(t time.Time) { s.startNS = t.UnixNano() }

// appendJournal writes e to the journal, if there is one, with the log
// sequence being applied.
func (s *Store) appendJournal(e journal.Entry) {
	if j := s.opts.Journal; j != nil {
		e.LogSeq = s.logSeq.Load()
		_ = j.Append(e) // a failure is logged and counted by the journal
	}
}

// Journal returns the store's journal, or nil.
func (s *Store) Journal() *journal.Journal { return s.opts.Journal }

// SyncJournal makes the journal's entries durable (a durable log does
// before it writes a checkpoint, so that the journal is never behind it).
func (s *Store) SyncJournal() error {
	if j := s.opts.Journal; j != nil {
		return j.Sync()
	}
	return nil
}

// removedUnit is the state of a unit a reload removed, and when.
type removedUnit struct {
	u  *Unit
	at time.Time
}

// entry is a unit and the configuration it has in this snapshot: ingest
// reads the configuration before it holds the unit's lock, so it must
// not read u.cfg, which a reload rewrites.
type entry struct {
	u     *Unit
	cfg   *fleet.Unit
	plaus *fleet.Plausibility // cfg's, with the defaults filled in
	lim   sampleBounds        // what a good sample of the unit stays within, from cfg and plaus
}

// sampleBounds are the ranges checkValues holds a sample to, worked
// out once per unit per fleet snapshot from the rating and the
// plausibility, so that the per-sample path reads these few numbers
// beside the unit (in the stream's Resolver) and not the unit's
// configuration. Each is computed by the same expression as in
// checkValues and checkPlausible, which give the reason when one fails.
type sampleBounds struct {
	vLo, vHi   float64 // kV
	sMax       float64 // |P| and |Q|, MW and Mvar
	fieldMax   float64 // A
	fLo, fHi   float64 // Hz
	mva, kv    float64 // the rating
	currentMax float64 // armature current, pu of rated
}

func newSampleBounds(cfg *fleet.Unit, p *fleet.Plausibility) sampleBounds {
	r := &cfg.Rating
	if cfg.Model == nil { // not from a fleet without errors: every sample goes to checkValues
		return sampleBounds{vLo: math.NaN()}
	}
	return sampleBounds{
		vLo: p.VoltageMinPU * r.KV, vHi: p.VoltageMaxPU * r.KV,
		sMax:     p.PowerMaxPU * r.MVA,
		fieldMax: p.FieldMaxPU * cfg.Model.RatedFieldCurrent() * cfg.Field.AirGapA,
		fLo:      0.5 * r.FrequencyHz, fHi: 1.5 * r.FrequencyHz,
		mva: r.MVA, kv: r.KV, currentMax: p.CurrentMaxPU,
	}
}

// within reports whether checkValues accepts smp: the same comparisons
// on the same numbers, NaN and infinities failing them. When it says
// no, checkValues finds the reason.
func (b *sampleBounds) within(smp *Sample) bool {
	finite := func(x float64) bool { return x-x == 0 }
	if !(finite(smp.PMW) && finite(smp.QMvar) && finite(smp.VKV)) {
		return false
	}
	if smp.HasFieldA && !(finite(smp.FieldA) && smp.FieldA >= 0 && !(smp.FieldA > b.fieldMax)) {
		return false
	}
	if smp.HasFreq && !(finite(smp.FrequencyHz) && smp.FrequencyHz >= b.fLo && smp.FrequencyHz <= b.fHi) {
		return false
	}
	if smp.HasCoolant && !finite(smp.Coolant) {
		return false
	}
	if !(smp.VKV > 0 && smp.VKV >= b.vLo && smp.VKV <= b.vHi) || math.Abs(smp.PMW) > b.sMax || math.Abs(smp.QMvar) > b.sMax {
		return false
	}
	iPU := math.Sqrt(smp.PMW*smp.PMW+smp.QMvar*smp.QMvar) / b.mva / (smp.VKV / b.kv)
	return !(iPU > b.currentMax)
}

type snapshot struct {
	fleet *fleet.Fleet
	byID  map[string]entry
	units []*Unit // fleet file order
}

// NewStore returns a store serving fl, which must have no errors.
func NewStore(fl *fleet.Fleet, opts Options) *Store {
	s := &Store{opts: opts.withDefaults(), hub: alarm.NewHub(), startNS: opts.withDefaults().Now().UnixNano()}
	s.snap.Store(newSnapshot(fl, nil, nil))
	s.removed = map[string]removedUnit{}
	return s
}

// Hub returns the hub on which the store publishes alarm events.
func (s *Store) Hub() *alarm.Hub { return s.hub }

// Transitions returns the number of alarm level changes by kind and
// level reached.
func (s *Store) Transitions() [alarm.NumKinds][3]uint64 {
	var t [alarm.NumKinds][3]uint64
	for k := range t {
		for l := range t[k] {
			t[k][l] = s.transitions[k][l].Load()
		}
	}
	return t
}

func newSnapshot(fl *fleet.Fleet, old *snapshot, removed map[string]removedUnit) *snapshot {
	sn := &snapshot{fleet: fl, byID: make(map[string]entry, len(fl.Units))}
	for _, cfg := range fl.Units {
		var u *Unit
		if old != nil {
			u = old.byID[cfg.ID].u
		}
		if u == nil {
			u = removed[cfg.ID].u // removed by mistake and back: warm
		}
		plaus := cfg.Plausibility.Effective()
		if u != nil {
			u.reconfigure(cfg, plaus)
		} else {
			u = new(Unit)
			u.setConfig(cfg, plaus)
		}
		sn.byID[cfg.ID] = entry{u, cfg, &plaus, newSampleBounds(cfg, &plaus)}
		sn.units = append(sn.units, u)
	}
	return sn
}

// Replace makes fl the served fleet. A unit whose id stays keeps its
// state (latest sample, thermal memory, timestamps) and is evaluated
// again against its new parameters; new units start empty. A unit no
// longer in the file has its active alarms ended, each with an event
// (and a journal entry), and its state is kept for RemovedGrace: added
// again within it, the unit comes back with its thermal memory. The
// reload itself is journalled.
func (s *Store) Replace(fl *fleet.Fleet) { s.ReplaceAt(fl, s.opts.Now()) }

// ReplaceAt is Replace at time now (a durable log gives the time of the
// reload's message, the same on every replica).
func (s *Store) ReplaceAt(fl *fleet.Fleet, now time.Time) {
	s.replaceMu.Lock()
	defer s.replaceMu.Unlock()
	for id, r := range s.removed {
		if now.Sub(r.at) > s.opts.RemovedGrace {
			delete(s.removed, id)
		}
	}
	old := s.snap.Load()
	sn := newSnapshot(fl, old, s.removed)
	s.snap.Store(sn)
	var gone, back []string
	for id := range sn.byID {
		if _, ok := s.removed[id]; ok {
			back = append(back, id)
			delete(s.removed, id)
		}
	}
	for _, cfg := range old.fleet.Units {
		if _, ok := sn.byID[cfg.ID]; ok {
			continue
		}
		u := old.byID[cfg.ID].u
		gone = append(gone, cfg.ID)
		s.removed[cfg.ID] = removedUnit{u, now}
		s.endAlarms(u, now)
	}
	if j := s.opts.Journal; j != nil {
		msg := fmt.Sprintf("Fleet file reloaded: %d units.", len(fl.Units))
		if len(gone) > 0 {
			msg += fmt.Sprintf(" Removed: %s (their state is kept for %s).", strings.Join(gone, ", "), s.opts.RemovedGrace)
		}
		if len(back) > 0 {
			slices.Sort(back)
			msg += fmt.Sprintf(" Back with their state: %s.", strings.Join(back, ", "))
		}
		s.appendJournal(journal.Entry{Time: now, Change: journal.ChangeReload, Message: msg})
		_ = j.Sync()
	}
}

// endAlarms ends the active alarms of unit u, which a reload removed,
// each with an event.
func (s *Store) endAlarms(u *Unit, now time.Time) {
	u.mu.Lock()
	defer u.mu.Unlock()
	u.rest.forget()
	for k := range u.alarms {
		m := &u.alarms[k]
		if m.Level == alarm.Normal && m.ShelvedUntil == 0 {
			*m = alarm.Machine{}
			continue
		}
		prev := m.Level
		*m = alarm.Machine{Since: now.UnixNano()}
		u.raised[k] = ""
		if prev == alarm.Normal {
			continue
		}
		s.transitions[k][alarm.Normal].Add(1)
		ev := u.event(alarm.Kind(k), alarm.LevelChanged, now, s.age(u, now))
		ev.Prev, ev.Removed = prev, true
		ev.Message = fmt.Sprintf("%s: removed from the fleet file by a reload; its %s alarm (%s) ends with it.", u.cfg.ID, alarm.Kind(k), prev)
		s.publish(ev)
	}
}

// Fleet returns the fleet being served.
func (s *Store) Fleet() *fleet.Fleet { return s.snap.Load().fleet }

// Unit returns the state of the unit with the given id, or nil.
func (s *Store) Unit(id string) *Unit { return s.snap.Load().byID[id].u }

// Units returns the state of every unit, in fleet file order. The slice
// must not be modified.
func (s *Store) Units() []*Unit { return s.snap.Load().units }

// Counts returns the number of samples by result since the store began.
func (s *Store) Counts() [NumResults]uint64 {
	var c [NumResults]uint64
	for i := range c {
		c[i] = s.counts[i].Load()
	}
	return c
}

// Tally counts results of one batch so that the shared counters are
// touched once per batch, not once per sample.
type Tally [NumResults]uint32

// Commit adds the tally to the store's counters.
func (s *Store) Commit(t *Tally) {
	for i, n := range t {
		if n > 0 {
			s.counts[i].Add(uint64(n))
		}
	}
}

// Accept places one sample: it checks it, and when it is good and new
// evaluates it against the unit's envelope and records it. now is the
// server clock, used only for the "too far in the future" check. For a
// rejected sample, detail says what was wrong in words for the sender.
func (s *Store) Accept(now time.Time, smp *Sample) (res Result, detail string) {
	return s.AcceptFrom(nil, now, smp)
}

// AcceptFrom is Accept with the unit found through r, the resolver of
// the stream the sample came on (nil: the fleet's map).
func (s *Store) AcceptFrom(r *Resolver, now time.Time, smp *Sample) (res Result, detail string) {
	u, res, detail := s.precheck(r, now, smp)
	if res != Accepted {
		return res, detail
	}
	return u.accept(smp, smp.Time.UnixNano(), now, s)
}

// Check says what Accept would answer for smp now, without recording
// anything: a replicated service checks a sample before it writes it to
// its log, and applies it with Accept when it reads it back.
func (s *Store) Check(now time.Time, smp *Sample) (res Result, detail string) {
	return s.CheckFrom(nil, now, smp)
}

// CheckFrom is Check with the unit found through r, the resolver of the
// stream the sample came on (nil: the fleet's map).
func (s *Store) CheckFrom(r *Resolver, now time.Time, smp *Sample) (res Result, detail string) {
	u, res, detail := s.precheck(r, now, smp)
	if res != Accepted {
		return res, detail
	}
	return u.order(smp.Time.UnixNano(), smp)
}

// precheck runs the checks of a sample that need no unit state. It
// finds the unit through r, or the fleet's map when r is nil.
func (s *Store) precheck(r *Resolver, now time.Time, smp *Sample) (*Unit, Result, string) {
	sn := s.snap.Load()
	var e *entry
	if r != nil {
		e = r.resolve(sn, smp.UnitID)
	} else if v, ok := sn.byID[smp.UnitID]; ok {
		e = &v
	}
	if e == nil {
		return nil, RejectUnknownUnit, UnknownUnitDetail(smp.UnitID)
	}
	res, d := s.checkSample(e, now, smp)
	return e.u, res, d
}

func (s *Store) checkSample(e *entry, now time.Time, smp *Sample) (Result, string) {
	if smp.Time.IsZero() {
		return RejectMissingTime, "the sample has no time"
	}
	// The time window is checked before any arithmetic with the time:
	// outside what UnixNano can hold, a time would wrap.
	if smp.Time.Before(minTime) || smp.Time.After(maxTime) {
		return RejectOutOfRangeTime, fmt.Sprintf("time %s is outside what the service can represent (%s to %s)",
			smp.Time.UTC().Format(time.RFC3339Nano), minTime.Format(time.RFC3339), maxTime.Format(time.RFC3339))
	}
	// Within the representable range: the rest is integer arithmetic.
	t, nowNS := smp.Time.UnixNano(), now.UnixNano()
	if t < satAdd(nowNS, -int64(s.opts.Horizon)) {
		return RejectOutOfRangeTime, fmt.Sprintf("time %s is more than %s before the server clock (%s); evaluate older history with genvelope replay --backfill",
			smp.Time.UTC().Format(time.RFC3339Nano), s.opts.Horizon, now.UTC().Format(time.RFC3339))
	}
	if t > satAdd(nowNS, int64(s.opts.MaxFuture)) {
		return RejectFuture, fmt.Sprintf("time %s is ahead of the server clock %s by more than %s (check the sender's clock)",
			smp.Time.UTC().Format(time.RFC3339Nano), now.UTC().Format(time.RFC3339Nano), s.opts.MaxFuture)
	}
	if smp.Quality == QualityInvalid {
		return RejectInvalidQuality, "the sample's quality is INVALID"
	}
	if e.lim.within(smp) {
		return Accepted, "" // what checkValues would say, without reading the configuration
	}
	return checkValues(e.cfg, e.plaus, smp)
}

// satAdd returns a + b, saturated at the ends of int64.
func satAdd(a, b int64) int64 {
	c := a + b
	switch {
	case b > 0 && c < a:
		return math.MaxInt64
	case b < 0 && c > a:
		return math.MinInt64
	}
	return c
}

// minTime and maxTime bound the sample times the service can hold in
// Unix nanoseconds (about 1677-09-21 to 2262-04-11), with a day to spare.
var (
	minTime = time.Unix(0, math.MinInt64).UTC().Add(24 * time.Hour)
	maxTime = time.Unix(0, math.MaxInt64).UTC().Add(-24 * time.Hour)
)

// checkValues rejects values that are not finite or not physical for the
// unit. The ranges are wide: they catch wrong scaling and broken links,
// not abnormal operation, which is what the envelope is for.
func checkValues(cfg *fleet.Unit, p *fleet.Plausibility, smp *Sample) (Result, string) {
	notFinite := func(x float64) bool { return x-x != 0 } // NaN or ±Inf
	if notFinite(smp.PMW) || notFinite(smp.QMvar) || notFinite(smp.VKV) ||
		smp.HasFieldA && notFinite(smp.FieldA) || smp.HasFreq && notFinite(smp.FrequencyHz) ||
		smp.HasCoolant && notFinite(smp.Coolant) {
		return RejectNotFinite, notFiniteDetail(smp)
	}
	r := &cfg.Rating
	// Values no machine can have; the narrower plausible ranges follow.
	switch {
	case !(smp.VKV > 0):
		return RejectOutOfRange, fmt.Sprintf("v_kv %g is not positive", smp.VKV)
	case smp.HasFieldA && !(smp.FieldA >= 0):
		return RejectOutOfRange, fmt.Sprintf("field_a %g is negative", smp.FieldA)
	case smp.HasFreq && !(smp.FrequencyHz >= 0.5*r.FrequencyHz && smp.FrequencyHz <= 1.5*r.FrequencyHz):
		return RejectOutOfRange, fmt.Sprintf("frequency_hz %g is outside [%g, %g] Hz (50 %% to 150 %% of rated)", smp.FrequencyHz, 0.5*r.FrequencyHz, 1.5*r.FrequencyHz)
	}
	return checkPlausible(cfg, p, smp)
}

// checkPlausible rejects values the machine cannot physically report
// (cfg.Plausibility), naming the likely unit mix-up.
func checkPlausible(cfg *fleet.Unit, p *fleet.Plausibility, smp *Sample) (Result, string) {
	r := &cfg.Rating
	vLo, vHi := p.VoltageMinPU*r.KV, p.VoltageMaxPU*r.KV
	inV := func(x float64) bool { return x >= vLo && x <= vHi }
	sMax := p.PowerMaxPU * r.MVA
	switch {
	case !inV(smp.VKV):
		return RejectImplausible, fmt.Sprintf("v_kv %g is outside the plausible %g to %g kV (%g to %g pu of rated %g kV)%s",
			smp.VKV, vLo, vHi, p.VoltageMinPU, p.VoltageMaxPU, r.KV,
			hint(smp.VKV, inV, "per unit", "kV", "volts", "line-to-neutral kV"))
	case math.Abs(smp.PMW) > sMax:
		return RejectImplausible, fmt.Sprintf("p_mw %g is beyond the plausible ±%g MW (%g × rated MVA)%s", smp.PMW, sMax, p.PowerMaxPU,
			hint(smp.PMW, func(x float64) bool { return math.Abs(x) <= sMax }, "", "MW", "kW", ""))
	case math.Abs(smp.QMvar) > sMax:
		return RejectImplausible, fmt.Sprintf("q_mvar %g is beyond the plausible ±%g Mvar (%g × rated MVA)%s", smp.QMvar, sMax, p.PowerMaxPU,
			hint(smp.QMvar, func(x float64) bool { return math.Abs(x) <= sMax }, "", "Mvar", "kvar", ""))
	case smp.HasFieldA && smp.FieldA > p.FieldMaxPU*cfg.Model.RatedFieldCurrent()*cfg.Field.AirGapA:
		fMax := p.FieldMaxPU * cfg.Model.RatedFieldCurrent() * cfg.Field.AirGapA
		return RejectImplausible, fmt.Sprintf("field_a %g is above the plausible %.0f A (%g × the rated field current)%s", smp.FieldA, fMax, p.FieldMaxPU,
			hint(smp.FieldA, func(x float64) bool { return x <= fMax }, "", "A", "mA", ""))
	}
	// Armature current, pu of rated: S/V in pu. The voltage is already
	// known to be plausible.
	iPU := math.Sqrt(smp.PMW*smp.PMW+smp.QMvar*smp.QMvar) / r.MVA / (smp.VKV / r.KV) // P and Q are bounded above: no overflow
	if iPU > p.CurrentMaxPU {
		return RejectImplausible, fmt.Sprintf("armature current %.2f pu (from P %g MW, Q %g Mvar at %g kV) is above the plausible %g pu of rated; check that P, Q and V are in MW, Mvar and line-line kV",
			iPU, smp.PMW, smp.QMvar, smp.VKV, p.CurrentMaxPU)
	}
	return Accepted, ""
}

// hint names the likely mix-up of an implausible value x, or returns "":
// per unit (x × rated would do; only for a voltage, where asPU names it),
// a thousand times too large (x / 1000 would do: sent in small, want
// big), or line-to-neutral (x × √3 would do).
func hint(x float64, ok func(float64) bool, asPU, want, small, lineNeutral string) string {
	switch {
	case asPU != "" && x > 0.3 && x < 2:
		return fmt.Sprintf("; it looks like %s: send %s", asPU, want)
	case small != "" && ok(x/1000) && !ok(x/10):
		return fmt.Sprintf("; it looks like %s: send %s", small, want)
	case lineNeutral != "" && ok(x*math.Sqrt(3)):
		return fmt.Sprintf("; it looks like %s: send %s line to line", lineNeutral, want)
	}
	return ""
}

// notFiniteDetail names the first value of smp that is NaN or infinite.
func notFiniteDetail(smp *Sample) string {
	for _, v := range [...]struct {
		name string
		x    float64
		has  bool
	}{
		{"p_mw", smp.PMW, true}, {"q_mvar", smp.QMvar, true}, {"v_kv", smp.VKV, true},
		{"field_a", smp.FieldA, smp.HasFieldA}, {"frequency_hz", smp.FrequencyHz, smp.HasFreq},
		{"coolant", smp.Coolant, smp.HasCoolant},
	} {
		if v.has && (math.IsNaN(v.x) || math.IsInf(v.x, 0)) {
			return fmt.Sprintf("%s is %v", v.name, v.x)
		}
	}
	return "a value is not finite"
}

// ringSize is how many recent accepted timestamps each unit remembers, so
// that a client resending a batch after a failure gets duplicates, not
// rejections. At one sample a second it covers a little over four minutes.
const ringSize = 256

// Unit is the live state of one unit. The fields a sample reads and
// writes come first, together, then the large arrays of which a sample
// touches one entry (the timestamps, the heating, the trend) and what
// only readers and alarm changes use: a sample's work then spans few
// cache lines of the unit, which matters when the fleet's state does
// not fit in cache.
type Unit struct {
	mu sync.Mutex
	// newestNS is the newest accepted timestamp (the ring's latest), Unix
	// ns, or 0 while there is none; written under mu, read without it by
	// order, so that the check before a log write (Store.Check) neither
	// takes the unit's lock nor reads its timestamps for a sample newer
	// than every one accepted: on the durable path the check and the
	// log's consumer run on different cores, and the lock's cache line
	// would move between them twice a sample.
	newestNS atomic.Int64

	cfg    *fleet.Unit
	has    bool          // a sample has been accepted
	stale  bool          // no sample for the stale-telemetry threshold (set by Sweep)
	rest   restCache     // which alarms are at rest, for the per-sample path (alarms.go)
	latest Sample        // the latest accepted sample
	eval   limits.Result // its evaluation (see complete)
	pt     limits.Point  // its operating point, per unit
	recvNS int64         // server time it was accepted, Unix ns
	lastNS int64         // its time, Unix ns
	hint   limits.Hint
	cc     cfgCopy // what evaluate reads of cfg

	// Accepted timestamps, Unix ns, increasing; ring[(head-1) mod
	// ringSize] is the latest, n of them are valid. The array is
	// allocated with the first sample: a configured unit that never
	// reports costs 2 KiB less (see "Fleet scale" in DEVELOPERS.md).
	head int
	n    int

	armature, field limits.Thermal
	xArm, xField    float64 // per-unit currents of the latest sample
	// The currents held into the accumulators until the next sample:
	// xArm and xField capped at MaxThermalX, or for a suspect sample
	// the lower of it and the one before.
	hArm, hField float64
	thermNS      int64 // sample time up to which the accumulators have advanced, Unix ns
	suspect      bool  // the latest sample is suspect (after a gap, or a jump)
	suspects     uint64
	accepted     uint64

	lim   limiterState       // the OEL and SCL timers (limiters.go)
	plaus fleet.Plausibility // cfg's, with the defaults filled in

	alarms [alarm.NumKinds]alarm.Machine
	ring   *[ringSize]int64       // see head
	heat   [heatSize]heatStep     // the heating each recent sample held
	trend  trend                  // headroom and nearest margin over the last hours (trend.go)
	raised [alarm.NumKinds]string // the sentence of what raised each active alarm
}

// heatSize is how many recent samples' heating a unit remembers, so
// that an operator can discard one sample's effect.
const heatSize = 16

// heatStep is the heating (s of the C50.13 integral) held from the
// sample at time t.
type heatStep struct {
	t           int64
	arm, field  float64
	discardable bool
}

// accept records a checked sample: a duplicate when its timestamp is
// one the unit has accepted, out of order when it is older than the
// latest, else evaluated and stored.
func (u *Unit) accept(smp *Sample, t int64, now time.Time, s *Store) (Result, string) {
	maxHold := int64(s.opts.MaxHold)
	u.mu.Lock()
	defer u.mu.Unlock()
	if r, d := u.orderLocked(t, smp); r != Accepted {
		return r, d
	}
	if u.n > 0 && t <= u.ring[(u.head+ringSize-1)%ringSize] {
		// Superseding a sample stamped ahead of the clock (orderLocked):
		// forget the times after t.
		for u.n > 0 && u.ring[(u.head+ringSize-1)%ringSize] > t {
			u.head = (u.head + ringSize - 1) % ringSize
			u.n--
		}
		u.thermNS = min(u.thermNS, t)
	}
	gap := !u.has || u.stale || t-u.lastNS > maxHold
	if u.has && !u.stale && t > u.thermNS {
		u.advance(min(t-u.thermNS, maxHold))
	}
	u.thermNS = max(u.thermNS, t)
	if u.ring == nil {
		u.ring = new([ringSize]int64)
	}
	u.ring[u.head] = t
	u.head = (u.head + 1) % ringSize
	if u.n < ringSize {
		u.n++
	}
	u.newestNS.Store(t)
	prevArm, prevField := u.hArm, u.hField
	prevXArm, prevXField := u.xArm, u.xField
	if gap {
		prevArm, prevField = 1, 1 // after a gap: neither heats nor cools until confirmed
	}
	u.latest = *smp
	u.has = true
	u.stale = false
	u.recvNS = now.UnixNano()
	u.lastNS = t
	u.accepted++
	u.evaluate()
	// Hold the new currents, capped; a suspect sample (the first after
	// a gap, or a jump beyond the plausible step) holds no more than
	// the current before it until a following sample confirms it.
	step := u.plaus.StepMaxPU
	xa, xf := min(u.xArm, MaxThermalX), min(u.xField, MaxThermalX)
	u.suspect = gap || math.Abs(u.xArm-prevXArm) > step || math.Abs(u.xField-prevXField) > step
	if u.suspect {
		u.suspects++
		xa, xf = min(xa, prevArm), min(xf, prevField)
	}
	u.hArm, u.hField = nanTo1(xa), nanTo1(xf)
	u.heat[u.accepted%heatSize] = heatStep{t: t, discardable: true}
	mismatch := u.alarms[alarm.FieldCurrentMismatch].Level
	u.stepAlarms(t, s, false)
	if (mismatch == alarm.Normal) != (u.alarms[alarm.FieldCurrentMismatch].Level == alarm.Normal) {
		u.evaluate() // the reading starts or stops counting with this very sample
	}
	u.recordTrend(t) // after the evaluation the alarms settled on
	return Accepted, ""
}

// nanTo1 returns x, or 1 (neither heating nor cooling) when x is NaN.
func nanTo1(x float64) float64 {
	if x != x {
		return 1
	}
	return x
}

// advance runs the accumulators dt ns of sample time with the held
// currents and books the heating to the latest sample. u.mu must be held.
func (u *Unit) advance(dt int64) {
	if dt <= 0 {
		return
	}
	h := &u.heat[u.accepted%heatSize]
	a0, f0 := u.armature.H, u.field.H
	sec := float64(dt) / 1e9
	u.armature.Advance(u.hArm, sec)
	u.field.Advance(u.hField, sec)
	u.advanceLimiters(sec)
	h.arm += u.armature.H - a0
	h.field += u.field.H - f0
}

// order says whether a sample at t is new (Accepted), a Duplicate or out
// of order for the unit.
func (u *Unit) order(t int64, smp *Sample) (Result, string) {
	if t > 0 && t > u.newestNS.Load() {
		return Accepted, "" // what orderLocked says of a time after the latest (or of any, with none)
	}
	u.mu.Lock()
	defer u.mu.Unlock()
	return u.orderLocked(t, smp)
}

// orderLocked is order with u.mu held. A sample older than the latest
// is new when the latest was stamped ahead of the clock when it arrived
// and this one after that moment: the future sample holds the order only
// up to its arrival, and this one supersedes it.
func (u *Unit) orderLocked(t int64, smp *Sample) (Result, string) {
	if u.n == 0 {
		return Accepted, ""
	}
	last := u.ring[(u.head+ringSize-1)%ringSize]
	if t > last {
		return Accepted, ""
	}
	if u.seen(t) {
		return Duplicate, ""
	}
	if u.has && u.lastNS > u.recvNS && t > u.recvNS {
		return Accepted, ""
	}
	return RejectOutOfOrder, u.outOfOrder(smp, last)
}

// outOfOrder says why a sample at or before the unit's latest time last
// was refused. u.mu must be held.
func (u *Unit) outOfOrder(smp *Sample, last int64) string {
	return fmt.Sprintf("time %s is older than the unit's latest accepted sample, %s: a unit's samples must come in time order (to evaluate recorded history, use genvelope replay --backfill)",
		smp.Time.UTC().Format(time.RFC3339Nano), time.Unix(0, last).UTC().Format(time.RFC3339Nano))
}

// seen reports whether t is among the remembered timestamps. They are
// increasing from the oldest to the newest, so it bisects.
func (u *Unit) seen(t int64) bool {
	lo, hi := 0, u.n // index k counts from the oldest
	oldest := u.head - u.n + ringSize
	for lo < hi {
		m := (lo + hi) / 2
		if u.ring[(oldest+m)%ringSize] < t {
			lo = m + 1
		} else {
			hi = m
		}
	}
	return lo < u.n && u.ring[(oldest+lo)%ringSize] == t
}

// cfgCopy is what evaluate reads of a unit's configuration, copied
// beside the hot state whenever the configuration is set (setConfig), so
// that a sample does not read the configuration itself: at 10,000 units
// that read was a cache miss on every sample (`report.Point` 6 % of the
// service in the load harness's profile).
type cfgCopy struct {
	base         limits.Base
	model        *limits.Unit
	coolantTable bool    // cfg.Coolant != nil
	mismatchWarn float64 // the field-current mismatch alarm's warning threshold, 0 when it is disabled
}

// setConfig gives the unit its configuration and the copy evaluate
// reads. u.mu must be held, or the unit not yet shared.
func (u *Unit) setConfig(cfg *fleet.Unit, plaus fleet.Plausibility) {
	u.cfg, u.plaus = cfg, plaus
	u.cc = cfgCopy{base: cfg.Base, model: cfg.Model, coolantTable: cfg.Coolant != nil}
	if set := &cfg.Alarms[alarm.FieldCurrentMismatch]; !set.Disabled {
		u.cc.mismatchWarn = set.Warning
	}
}

// evaluate places u.latest against the envelope. u.mu must be held.
func (u *Unit) evaluate() {
	c := &u.cc
	s := &u.latest
	// A measured field current on a QUESTIONABLE sample, one far from the
	// model (beyond the mismatch alarm's warning threshold), or one read
	// while the field-current mismatch alarm is active (a frozen or
	// drifting sensor) is doubted: the field margin, and the heating of
	// the winding, take the larger of it and the model's (envelope.md,
	// "Margins"), as neither can be trusted alone.
	pt := report.PointOn(c.base, c.coolantTable, report.Reading{PMW: s.PMW, QMvar: s.QMvar, VKV: s.VKV, FieldA: s.FieldA, HasFieldA: s.HasFieldA,
		FrequencyHz: s.FrequencyHz, HasFrequency: s.HasFreq, Coolant: s.Coolant, HasCoolant: s.HasCoolant})
	pt.IfdDoubtful = s.Quality == QualityQuestionable || u.alarms[alarm.FieldCurrentMismatch].Level != alarm.Normal
	pt.IfdMismatch = c.mismatchWarn
	// The per-sample evaluation leaves q_max to be solved by the first
	// reader (complete): samples come far more often than reads.
	u.eval = c.model.EvaluateSample(pt, &u.hint)
	u.pt = pt
	u.xArm = u.eval.I / u.eval.IMax
	u.xField = u.eval.FieldCurrent / u.eval.IfdMax
	u.holdLimiters()
}

// complete solves what the per-sample evaluation left pending. u.mu
// must be held.
func (u *Unit) complete() {
	if u.has && u.eval.QMaxPending {
		u.cfg.Model.Complete(&u.eval, u.pt)
	}
}

// reconfigure gives the unit new parameters after a reload and
// evaluates its latest sample against them.
func (u *Unit) reconfigure(cfg *fleet.Unit, plaus fleet.Plausibility) {
	u.mu.Lock()
	defer u.mu.Unlock()
	u.setConfig(cfg, plaus)
	u.hint = limits.Hint{}
	u.rest.forget() // new settings
	if u.has {
		u.evaluate()
	}
}

// DataState says whether a unit's values can be trusted as present.
type DataState uint8

const (
	NoData    DataState = iota // the unit has never reported (since the service started, or in the state file)
	DataFresh                  // samples are arriving
	DataStale                  // no sample for the stale-telemetry warning threshold: the values shown are old
	NumDataStates
)

// String returns "no_data", "fresh" or "stale" (the metrics' state label).
func (d DataState) String() string {
	switch d {
	case NoData:
		return "no_data"
	case DataFresh:
		return "fresh"
	case DataStale:
		return "stale"
	}
	return fmt.Sprintf("DataState(%d)", uint8(d))
}

// View is a consistent copy of one unit's state.
type View struct {
	Config    *fleet.Unit
	Data      DataState // no data, fresh or stale
	HasSample bool
	Latest    Sample
	Eval      limits.Result
	Point     limits.Point // the latest sample in per unit, as evaluated
	Received  time.Time
	Accepted  uint64         // samples accepted since the service started
	Armature  limits.Thermal // short-time thermal accumulators
	Field     limits.Thermal
	XArmature float64 // per-unit currents of the latest sample against the ratings at the present coolant
	XField    float64
	// ThermalUnknown: the unit is stale, so its thermal state is not
	// known (shown as "unknown (stale)", never as normal).
	ThermalUnknown bool
	Suspect        bool   // the latest sample is suspect (first after a gap, or a jump): its current is not yet held
	Suspects       uint64 // suspect samples since the service started
	Alarms         [alarm.NumKinds]alarm.Machine
	Limiters       LimiterView // the OEL and SCL timers, the V/Hz limiter margin
}

// Config returns the unit's configuration (a reload replaces it).
func (u *Unit) Config() *fleet.Unit {
	u.mu.Lock()
	defer u.mu.Unlock()
	return u.cfg
}

// View returns a consistent copy of the unit's state.
func (u *Unit) View() View {
	u.mu.Lock()
	defer u.mu.Unlock()
	u.complete()
	v := View{Config: u.cfg, HasSample: u.has, Accepted: u.accepted, Armature: u.armature, Field: u.field,
		XArmature: u.xArm, XField: u.xField, Alarms: u.alarms, Suspect: u.suspect, Suspects: u.suspects,
		Limiters: u.limiterView()}
	switch {
	case !u.has:
		v.Data = NoData
	case u.stale:
		v.Data, v.ThermalUnknown = DataStale, true
	default:
		v.Data = DataFresh
	}
	if u.has {
		v.Latest, v.Eval, v.Point, v.Received = u.latest, u.eval, u.pt, time.Unix(0, u.recvNS)
	}
	return v
}
