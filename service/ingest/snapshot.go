package ingest

import (
	"time"

	"github.com/genvelope/genvelope/service/alarm"
)

// SnapshotVersion is the version of the Snapshot layout; a snapshot of
// another version is not restored.
const SnapshotVersion = 1

// snapshotTimes is how many recent timestamps of each unit a snapshot
// keeps, so that a client resending after a restart still gets
// duplicates for its most recent samples.
const snapshotTimes = 32

// Snapshot is the state that must survive a restart: what a restart must
// not forget (a winding just overloaded, an alarm acknowledged or
// shelved) and what keeps resent samples duplicates.
type Snapshot struct {
	Format  string                  `json:"format"` // "genvelope-state"
	Version int                     `json:"version"`
	Written time.Time               `json:"written"`
	Units   map[string]UnitSnapshot `json:"units"`
}

// UnitSnapshot is one unit's part of a Snapshot.
type UnitSnapshot struct {
	Times     []int64                  `json:"times_unix_ns"` // recent accepted sample times, oldest first
	Latest    *SampleSnapshot          `json:"latest,omitempty"`
	ArmatureH float64                  `json:"armature_heating_s"`
	FieldH    float64                  `json:"field_heating_s"`
	XArmature float64                  `json:"armature_current_pu"` // held until the next sample
	XField    float64                  `json:"field_current_pu"`
	Alarms    map[string]alarm.Machine `json:"alarms,omitempty"`         // machines not at rest, by limit name
	OELUsed   float64                  `json:"oel_used_ratio,omitempty"` // limiter timers (limiters.go)
	SCLUsed   float64                  `json:"scl_used_ratio,omitempty"`
}

// SampleSnapshot is the latest accepted sample and when it arrived.
type SampleSnapshot struct {
	Sample
	ReceivedUnixNS int64 `json:"received_unix_ns"`
}

// Snapshot copies the durable state of every unit.
func (s *Store) Snapshot(now time.Time) *Snapshot {
	sn := &Snapshot{Format: "genvelope-state", Version: SnapshotVersion, Written: now.UTC(), Units: map[string]UnitSnapshot{}}
	for _, u := range s.Units() {
		u.mu.Lock()
		us := UnitSnapshot{ArmatureH: u.armature.H, FieldH: u.field.H, XArmature: u.xArm, XField: u.xField,
			OELUsed: u.lim.oel.Used, SCLUsed: u.lim.scl.Used}
		n := min(u.n, snapshotTimes)
		for i := n; i > 0; i-- {
			us.Times = append(us.Times, u.ring[(u.head-i+ringSize)%ringSize])
		}
		if u.has {
			us.Latest = &SampleSnapshot{Sample: u.latest, ReceivedUnixNS: u.recvNS}
		}
		for k, m := range u.alarms {
			if m.Level != alarm.Normal || m.ShelvedUntil != 0 || m.Raising != [2]bool{} {
				if us.Alarms == nil {
					us.Alarms = map[string]alarm.Machine{}
				}
				us.Alarms[alarm.Kind(k).String()] = m
			}
		}
		sn.Units[u.cfg.ID] = us
		u.mu.Unlock()
	}
	return sn
}

// Restore puts a snapshot's state back into the store's units, matched
// by id, and evaluates each restored latest sample again. It returns how
// many units were restored and the ids in the snapshot that the fleet no
// longer has.
func (s *Store) Restore(sn *Snapshot) (restored int, unknown []string) {
	for id, us := range sn.Units {
		u := s.Unit(id)
		if u == nil {
			unknown = append(unknown, id)
			continue
		}
		u.mu.Lock()
		u.n, u.head = 0, 0
		for _, t := range us.Times {
			if u.n > 0 && t <= u.ring[(u.head+ringSize-1)%ringSize] {
				continue // keep the ring increasing whatever the file says
			}
			u.ring[u.head] = t
			u.head = (u.head + 1) % ringSize
			u.n = min(u.n+1, ringSize)
		}
		u.armature.H, u.field.H = max(0, us.ArmatureH), max(0, us.FieldH)
		u.xArm, u.xField = us.XArmature, us.XField
		u.lim.oel.Used, u.lim.scl.Used = min(1, max(0, us.OELUsed)), min(1, max(0, us.SCLUsed))
		if us.Latest != nil {
			u.latest, u.recvNS, u.has = us.Latest.Sample, us.Latest.ReceivedUnixNS, true
			u.evaluate()
		}
		for name, m := range us.Alarms {
			if k, ok := alarm.ParseKind(name); ok && m.Level <= alarm.Critical {
				u.alarms[k] = m
			}
		}
		u.mu.Unlock()
		restored++
	}
	return restored, unknown
}
