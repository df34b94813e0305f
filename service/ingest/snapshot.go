package ingest

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

// SnapshotVersion is the last version of the JSON state layout, which
// is still read (statefile.go has the binary format the service writes,
// BinarySnapshotVersion). Version 2 keeps each unit's whole duplicate
// window and carries a checksum; version 1 has neither.
const SnapshotVersion = 2

// Snapshot is the state that must survive a restart: what a restart must
// not forget (a winding just overloaded, an alarm acknowledged or
// shelved) and what keeps resent samples duplicates.
type Snapshot struct {
	Format  string                  `json:"format"` // "genvelope-state"
	Version int                     `json:"version"`
	Written time.Time               `json:"written"`
	Units   map[string]UnitSnapshot `json:"units"`
	// Checksum is the SHA-256, in hex, of the snapshot encoded with an
	// empty checksum (see Seal): a file changed after it was written is
	// not restored.
	Checksum string `json:"checksum,omitempty"`
	// Bad are the entries of a binary state file that did not decode
	// (*BadEntryError): Restore reports them with the bad entries.
	Bad []error `json:"-"`
}

// UnitSnapshot is one unit's part of a Snapshot.
type UnitSnapshot struct {
	Times     []int64                  `json:"times_unix_ns"` // recent accepted sample times, oldest first (the whole duplicate window)
	Latest    *SampleSnapshot          `json:"latest,omitempty"`
	ArmatureH float64                  `json:"armature_heating_s"`
	FieldH    float64                  `json:"field_heating_s"`
	XArmature float64                  `json:"armature_current_pu"` // held until the next sample
	XField    float64                  `json:"field_current_pu"`
	ThermalNS int64                    `json:"thermal_unix_ns,omitempty"` // sample time the accumulators had reached
	Alarms    map[string]alarm.Machine `json:"alarms,omitempty"`          // machines not at rest, by limit name
	OELUsed   float64                  `json:"oel_used_ratio,omitempty"`  // limiter timers (limiters.go)
	SCLUsed   float64                  `json:"scl_used_ratio,omitempty"`
	// The heating each recent sample held, oldest first (DiscardSample
	// takes one back), and whether the latest sample is suspect and the
	// unit stale: with them a replica restored from its checkpoint
	// applies the rest of the log exactly as one that never stopped.
	Heat    []HeatSnapshot `json:"heat,omitempty"`
	Suspect bool           `json:"suspect,omitempty"`
	Stale   bool           `json:"stale,omitempty"`
}

// HeatSnapshot is the heating (s of the C50.13 integral) one recent
// sample held into the accumulators.
type HeatSnapshot struct {
	TimeUnixNS  int64   `json:"time_unix_ns"`
	ArmatureS   float64 `json:"armature_s"`
	FieldS      float64 `json:"field_s"`
	Discardable bool    `json:"discardable,omitempty"`
}

// SampleSnapshot is the latest accepted sample and when it arrived.
type SampleSnapshot struct {
	Sample
	ReceivedUnixNS int64 `json:"received_unix_ns"`
}

// Seal sets sn's checksum.
func (sn *Snapshot) Seal() error {
	sum, err := sn.sum()
	if err != nil {
		return err
	}
	sn.Checksum = sum
	return nil
}

// Verify reports whether sn's checksum matches its content. A version 1
// snapshot has none and passes.
func (sn *Snapshot) Verify() error {
	if sn.Version < 2 && sn.Checksum == "" {
		return nil
	}
	want := sn.Checksum
	got, err := sn.sum()
	if err != nil {
		return err
	}
	if got != want {
		return fmt.Errorf("checksum mismatch (file says %.12s…, content gives %.12s…): the file was changed after it was written", want, got)
	}
	return nil
}

func (sn *Snapshot) sum() (string, error) {
	c := *sn
	c.Checksum = ""
	data, err := json.Marshal(&c) // map keys sorted: the encoding is deterministic
	if err != nil {
		return "", err
	}
	h := sha256.Sum256(data)
	return hex.EncodeToString(h[:]), nil
}

// Snapshot copies the durable state of every unit.
func (s *Store) Snapshot(now time.Time) *Snapshot {
	sn := &Snapshot{Format: "genvelope-state", Version: BinarySnapshotVersion, Written: now.UTC(), Units: map[string]UnitSnapshot{}}
	for _, u := range s.Units() {
		var us UnitSnapshot
		var smp SampleSnapshot
		u.mu.Lock()
		u.snapshotInto(&us, &smp)
		sn.Units[u.cfg.ID] = us
		u.mu.Unlock()
	}
	return sn
}

// snapshotInto copies u's durable state into us, reusing its Times, Heat
// and Alarms; us.Latest is smp when u has a sample. u.mu must be held.
func (u *Unit) snapshotInto(us *UnitSnapshot, smp *SampleSnapshot) {
	times, heat, alarms := us.Times[:0], us.Heat[:0], us.Alarms
	clear(alarms)
	*us = UnitSnapshot{ArmatureH: u.armature.H, FieldH: u.field.H, XArmature: u.hArm, XField: u.hField, ThermalNS: u.thermNS,
		OELUsed: u.lim.oel.Used, SCLUsed: u.lim.scl.Used}
	for i := u.n; i > 0; i-- {
		times = append(times, u.ring[(u.head-i+ringSize)%ringSize])
	}
	us.Times = times
	if u.has {
		*smp = SampleSnapshot{Sample: u.latest, ReceivedUnixNS: u.recvNS}
		us.Latest = smp
		us.Suspect, us.Stale = u.suspect, u.stale
	}
	for i := uint64(heatSize - 1); ; i-- { // oldest first: the newest is heat[accepted % heatSize]
		if h := u.heat[(u.accepted-i)%heatSize]; h != (heatStep{}) {
			heat = append(heat, HeatSnapshot{TimeUnixNS: h.t, ArmatureS: h.arm, FieldS: h.field, Discardable: h.discardable})
		}
		if i == 0 {
			break
		}
	}
	if len(heat) > 0 {
		us.Heat = heat
	}
	for k, m := range u.alarms {
		if m.Level != alarm.Normal || m.ShelvedUntil != 0 || m.Raising != [2]bool{} {
			if alarms == nil {
				alarms = map[string]alarm.Machine{}
			}
			alarms[alarm.Kind(k).String()] = m
		}
	}
	if len(alarms) > 0 {
		us.Alarms = alarms
	}
}

// Restore puts a snapshot's state back into the store's units, matched
// by id, and evaluates each restored latest sample again. Every unit's
// entry is checked field by field first (finite, in range, a plausible
// latest sample): a bad entry is not restored, and said why in bad; the
// others are. It returns how many units were restored and the ids in
// the snapshot that the fleet no longer has.
func (s *Store) Restore(sn *Snapshot) (restored int, unknown []string, bad []error) {
	bad = append(bad, sn.Bad...)
	for id, us := range sn.Units {
		known, err := s.RestoreUnit(id, &us)
		switch {
		case !known:
			unknown = append(unknown, id)
		case err != nil:
			bad = append(bad, err)
		default:
			restored++
		}
	}
	return restored, unknown, bad
}

// RestoreUnit puts one unit's saved state back (see Restore). known is
// false when the fleet has no unit id; err says why a bad entry was not
// restored.
func (s *Store) RestoreUnit(id string, us *UnitSnapshot) (known bool, err error) {
	u := s.Unit(id)
	if u == nil {
		return false, nil
	}
	u.mu.Lock()
	cfg, plaus := u.cfg, u.plaus
	u.mu.Unlock()
	if err := checkUnitSnapshot(cfg, &plaus, us); err != nil {
		return true, fmt.Errorf("unit %q: %w", ClipID(id), err)
	}
	u.mu.Lock()
	defer u.mu.Unlock()
	u.n, u.head = 0, 0
	if len(us.Times) > 0 && u.ring == nil {
		u.ring = new([ringSize]int64)
	}
	for _, t := range us.Times {
		if u.n > 0 && t <= u.ring[(u.head+ringSize-1)%ringSize] {
			continue // keep the ring increasing whatever the file says
		}
		u.ring[u.head] = t
		u.head = (u.head + 1) % ringSize
		u.n = min(u.n+1, ringSize)
	}
	u.newestNS.Store(0)
	if u.n > 0 {
		u.newestNS.Store(u.ring[(u.head+ringSize-1)%ringSize])
	}
	u.armature.H, u.field.H = us.ArmatureH, us.FieldH
	u.lim.oel.Used, u.lim.scl.Used = min(1, max(0, us.OELUsed)), min(1, max(0, us.SCLUsed))
	if us.Latest != nil {
		u.latest, u.recvNS, u.has = us.Latest.Sample, us.Latest.ReceivedUnixNS, true
		u.lastNS = u.latest.Time.UnixNano()
		u.thermNS = max(u.lastNS, us.ThermalNS)
		for k, m := range us.Alarms {
			if k == alarm.FieldCurrentMismatch.String() {
				u.alarms[alarm.FieldCurrentMismatch] = m // before evaluate: it decides whether the measured field current counts
			}
		}
		u.evaluate()
		u.suspect, u.stale = us.Suspect, us.Stale
	}
	u.heat = [heatSize]heatStep{}
	for i, h := range us.Heat[max(0, len(us.Heat)-heatSize):] { // the newest at heat[accepted % heatSize]
		back := uint64(min(len(us.Heat), heatSize) - 1 - i)
		u.heat[(u.accepted-back)%heatSize] = heatStep{t: h.TimeUnixNS, arm: h.ArmatureS, field: h.FieldS, discardable: h.Discardable}
	}
	u.hArm, u.hField = us.XArmature, us.XField
	for name, m := range us.Alarms {
		if k, ok := alarm.ParseKind(name); ok {
			u.alarms[k] = m
		}
	}
	u.rest.forget()
	return true, nil
}

// checkUnitSnapshot says what is wrong with a unit's saved state, or
// returns nil.
func checkUnitSnapshot(cfg *fleet.Unit, plaus *fleet.Plausibility, us *UnitSnapshot) error {
	switch {
	case !finite(us.ArmatureH) || us.ArmatureH < 0 || us.ArmatureH > maxRestoredHeatingS:
		return fmt.Errorf("armature_heating_s %v is not in [0, %g]", us.ArmatureH, maxRestoredHeatingS)
	case !finite(us.FieldH) || us.FieldH < 0 || us.FieldH > maxRestoredHeatingS:
		return fmt.Errorf("field_heating_s %v is not in [0, %g]", us.FieldH, maxRestoredHeatingS)
	case !finite(us.XArmature) || us.XArmature < 0 || us.XArmature > MaxThermalX:
		return fmt.Errorf("armature_current_pu %v is not in [0, %g]", us.XArmature, MaxThermalX)
	case !finite(us.XField) || us.XField < 0 || us.XField > MaxThermalX:
		return fmt.Errorf("field_current_pu %v is not in [0, %g]", us.XField, MaxThermalX)
	case len(us.Times) > ringSize:
		return fmt.Errorf("%d times, more than the %d a unit remembers", len(us.Times), ringSize)
	case len(us.Heat) > heatSize:
		return fmt.Errorf("%d heating steps, more than the %d a unit remembers", len(us.Heat), heatSize)
	}
	for _, h := range us.Heat {
		if !finite(h.ArmatureS) || !finite(h.FieldS) || math.Abs(h.ArmatureS) > maxRestoredHeatingS || math.Abs(h.FieldS) > maxRestoredHeatingS {
			return fmt.Errorf("heating step at %d: armature %v s, field %v s: not within ±%g s", h.TimeUnixNS, h.ArmatureS, h.FieldS, maxRestoredHeatingS)
		}
	}
	for name, m := range us.Alarms {
		if _, ok := alarm.ParseKind(name); !ok {
			return fmt.Errorf("alarm %q is not an alarm", name)
		}
		if m.Level > alarm.Critical || !finite(m.Value) {
			return fmt.Errorf("alarm %q: level %d, value %v", name, m.Level, m.Value)
		}
	}
	if l := us.Latest; l != nil {
		if l.Time.IsZero() || l.Time.Before(minTime) || l.Time.After(maxTime) {
			return fmt.Errorf("latest sample time %s is outside what the service can represent", l.Time.UTC().Format(time.RFC3339Nano))
		}
		if l.Quality > QualityQuestionable {
			return fmt.Errorf("latest sample quality %d", l.Quality)
		}
		if r, d := checkValues(cfg, plaus, &l.Sample); r != Accepted {
			return fmt.Errorf("latest sample: %s: %s", r, d)
		}
	}
	return nil
}

// maxRestoredHeatingS bounds a restored heating integral: ten times the
// larger C50.13 constant, far beyond any alarm.
const maxRestoredHeatingS = 10 * limits.ArmatureK

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
