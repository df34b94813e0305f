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
	"sync"
	"sync/atomic"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
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
	NumResults
)

var resultNames = [NumResults]string{
	"accepted", "duplicate", "unknown_unit", "not_finite", "out_of_range",
	"out_of_order", "future", "invalid_quality", "missing_time",
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
	// stamped. Default 5 minutes.
	MaxFuture time.Duration
	// MaxHold is the longest gap between two samples over which the
	// thermal accumulators hold the earlier sample's current. A longer
	// gap counts as MaxHold: what flowed beyond it is not known.
	// Default 60 s.
	MaxHold time.Duration
	// Now is the wall clock, for stale telemetry and shelving; default
	// time.Now.
	Now func() time.Time
}

func (o Options) withDefaults() Options {
	if o.MaxFuture <= 0 {
		o.MaxFuture = 5 * time.Minute
	}
	if o.MaxHold <= 0 {
		o.MaxHold = 60 * time.Second
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
}

// entry is a unit and the configuration it has in this snapshot: ingest
// reads the configuration before it holds the unit's lock, so it must
// not read u.cfg, which a reload rewrites.
type entry struct {
	u   *Unit
	cfg *fleet.Unit
}

type snapshot struct {
	fleet *fleet.Fleet
	byID  map[string]entry
	units []*Unit // fleet file order
}

// NewStore returns a store serving fl, which must have no errors.
func NewStore(fl *fleet.Fleet, opts Options) *Store {
	s := &Store{opts: opts.withDefaults(), hub: alarm.NewHub(), startNS: opts.withDefaults().Now().UnixNano()}
	s.snap.Store(newSnapshot(fl, nil))
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

func newSnapshot(fl *fleet.Fleet, old *snapshot) *snapshot {
	sn := &snapshot{fleet: fl, byID: make(map[string]entry, len(fl.Units))}
	for _, cfg := range fl.Units {
		var u *Unit
		if old != nil {
			u = old.byID[cfg.ID].u
		}
		if u != nil {
			u.reconfigure(cfg)
		} else {
			u = &Unit{cfg: cfg}
		}
		sn.byID[cfg.ID] = entry{u, cfg}
		sn.units = append(sn.units, u)
	}
	return sn
}

// Replace makes fl the served fleet. A unit whose id stays keeps its
// state (latest sample, thermal memory, timestamps) and is evaluated
// again against its new parameters; new units start empty; units no
// longer in the file are dropped.
func (s *Store) Replace(fl *fleet.Fleet) {
	s.snap.Store(newSnapshot(fl, s.snap.Load()))
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
	u, res, detail := s.precheck(now, smp)
	if res != Accepted {
		return res, detail
	}
	return u.accept(smp, now, s)
}

// Check says what Accept would answer for smp now, without recording
// anything: a replicated service checks a sample before it writes it to
// its log, and applies it with Accept when it reads it back.
func (s *Store) Check(now time.Time, smp *Sample) (res Result, detail string) {
	u, res, detail := s.precheck(now, smp)
	if res != Accepted {
		return res, detail
	}
	return u.order(smp.Time.UnixNano(), smp)
}

// precheck runs the checks of a sample that need no unit state.
func (s *Store) precheck(now time.Time, smp *Sample) (*Unit, Result, string) {
	sn := s.snap.Load()
	e, ok := sn.byID[smp.UnitID]
	if !ok {
		return nil, RejectUnknownUnit, fmt.Sprintf("unit %q is not in the fleet file", smp.UnitID)
	}
	r, d := s.checkSample(e, now, smp)
	return e.u, r, d
}

func (s *Store) checkSample(e entry, now time.Time, smp *Sample) (Result, string) {
	if smp.Time.IsZero() {
		return RejectMissingTime, "the sample has no time"
	}
	if smp.Quality == QualityInvalid {
		return RejectInvalidQuality, "the sample's quality is INVALID"
	}
	if r, d := checkValues(e.cfg, smp); r != Accepted {
		return r, d
	}
	if smp.Time.Sub(now) > s.opts.MaxFuture {
		return RejectFuture, fmt.Sprintf("time %s is %s ahead of the server clock (at most %s)",
			smp.Time.UTC().Format(time.RFC3339Nano), smp.Time.Sub(now).Round(time.Millisecond), s.opts.MaxFuture)
	}
	return Accepted, ""
}

// checkValues rejects values that are not finite or not physical for the
// unit. The ranges are wide: they catch wrong scaling and broken links,
// not abnormal operation, which is what the envelope is for.
func checkValues(cfg *fleet.Unit, smp *Sample) (Result, string) {
	notFinite := func(x float64) bool { return x-x != 0 } // NaN or ±Inf
	if notFinite(smp.PMW) || notFinite(smp.QMvar) || notFinite(smp.VKV) ||
		smp.HasFieldA && notFinite(smp.FieldA) || smp.HasFreq && notFinite(smp.FrequencyHz) ||
		smp.HasCoolant && notFinite(smp.Coolant) {
		return RejectNotFinite, notFiniteDetail(smp)
	}
	r := &cfg.Rating
	sMax := 5 * r.MVA
	switch {
	case math.Abs(smp.PMW) > sMax:
		return RejectOutOfRange, fmt.Sprintf("p_mw %g is beyond ±%g MW (5 × rated MVA)", smp.PMW, sMax)
	case math.Abs(smp.QMvar) > sMax:
		return RejectOutOfRange, fmt.Sprintf("q_mvar %g is beyond ±%g Mvar (5 × rated MVA)", smp.QMvar, sMax)
	case !(smp.VKV > 0.05*r.KV && smp.VKV <= 2*r.KV):
		return RejectOutOfRange, fmt.Sprintf("v_kv %g is outside (%g, %g] kV (5 %% to 200 %% of rated)", smp.VKV, 0.05*r.KV, 2*r.KV)
	case smp.HasFieldA && !(smp.FieldA >= 0 && smp.FieldA <= 10*cfg.Field.AirGapA):
		return RejectOutOfRange, fmt.Sprintf("field_a %g is outside [0, %g] A (10 × IFag)", smp.FieldA, 10*cfg.Field.AirGapA)
	case smp.HasFreq && !(smp.FrequencyHz >= 0.5*r.FrequencyHz && smp.FrequencyHz <= 1.5*r.FrequencyHz):
		return RejectOutOfRange, fmt.Sprintf("frequency_hz %g is outside [%g, %g] Hz (50 %% to 150 %% of rated)", smp.FrequencyHz, 0.5*r.FrequencyHz, 1.5*r.FrequencyHz)
	}
	return Accepted, ""
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

// Unit is the live state of one unit.
type Unit struct {
	mu sync.Mutex

	cfg    *fleet.Unit
	hint   limits.Hint
	has    bool          // a sample has been accepted
	latest Sample        // the latest accepted sample
	eval   limits.Result // its evaluation (see complete)
	pt     limits.Point  // its operating point, per unit
	recvNS int64         // server time it was accepted, Unix ns

	// Accepted timestamps, Unix ns, increasing; ring[(head-1) mod
	// ringSize] is the latest, n of them are valid.
	ring [ringSize]int64
	head int
	n    int

	armature, field limits.Thermal
	xArm, xField    float64 // per-unit currents of the latest sample, held until the next
	accepted        uint64

	alarms [alarm.NumKinds]alarm.Machine
}

// accept records a checked sample: a duplicate when its timestamp is
// one the unit has accepted, out of order when it is older than the
// latest, else evaluated and stored.
func (u *Unit) accept(smp *Sample, now time.Time, s *Store) (Result, string) {
	maxHold := s.opts.MaxHold
	t := smp.Time.UnixNano()
	u.mu.Lock()
	defer u.mu.Unlock()
	if r, d := u.orderLocked(t, smp); r != Accepted {
		return r, d
	}
	if u.n > 0 {
		last := u.ring[(u.head+ringSize-1)%ringSize]
		dt := time.Duration(t - last)
		if dt > maxHold {
			dt = maxHold
		}
		u.armature.Advance(u.xArm, dt.Seconds())
		u.field.Advance(u.xField, dt.Seconds())
	}
	u.ring[u.head] = t
	u.head = (u.head + 1) % ringSize
	if u.n < ringSize {
		u.n++
	}
	u.latest = *smp
	u.has = true
	u.recvNS = now.UnixNano()
	u.accepted++
	u.evaluate()
	u.stepAlarms(t, s)
	return Accepted, ""
}

// order says whether a sample at t is new (Accepted), a Duplicate or out
// of order for the unit.
func (u *Unit) order(t int64, smp *Sample) (Result, string) {
	u.mu.Lock()
	defer u.mu.Unlock()
	return u.orderLocked(t, smp)
}

// orderLocked is order with u.mu held.
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
	return RejectOutOfOrder, fmt.Sprintf("time %s is older than the unit's latest accepted sample, %s",
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

// evaluate places u.latest against the envelope. u.mu must be held.
func (u *Unit) evaluate() {
	cfg := u.cfg
	s := &u.latest
	// A measured field current on a QUESTIONABLE sample, or one far from
	// the model (beyond the mismatch alarm's warning threshold), is
	// doubted: the field margin takes the larger of it and the model's.
	pt := report.Point(cfg, s.PMW, s.QMvar, s.VKV, s.FieldA, s.HasFieldA,
		s.FrequencyHz, s.HasFreq, s.Coolant, s.HasCoolant)
	pt.IfdDoubtful = s.Quality == QualityQuestionable
	if set := &cfg.Alarms[alarm.FieldCurrentMismatch]; !set.Disabled {
		pt.IfdMismatch = set.Warning
	}
	// The per-sample evaluation leaves q_max to be solved by the first
	// reader (complete): samples come far more often than reads.
	u.eval = cfg.Model.EvaluateSample(pt, &u.hint)
	u.pt = pt
	u.xArm = u.eval.I / u.eval.IMax
	u.xField = u.eval.FieldCurrent / u.eval.IfdMax
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
func (u *Unit) reconfigure(cfg *fleet.Unit) {
	u.mu.Lock()
	defer u.mu.Unlock()
	u.cfg = cfg
	u.hint = limits.Hint{}
	if u.has {
		u.evaluate()
	}
}

// View is a consistent copy of one unit's state.
type View struct {
	Config    *fleet.Unit
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
	Alarms    [alarm.NumKinds]alarm.Machine
}

// View returns a consistent copy of the unit's state.
func (u *Unit) View() View {
	u.mu.Lock()
	defer u.mu.Unlock()
	u.complete()
	v := View{Config: u.cfg, HasSample: u.has, Accepted: u.accepted, Armature: u.armature, Field: u.field,
		XArmature: u.xArm, XField: u.xField, Alarms: u.alarms}
	if u.has {
		v.Latest, v.Eval, v.Point, v.Received = u.latest, u.eval, u.pt, time.Unix(0, u.recvNS)
	}
	return v
}
