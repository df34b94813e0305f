// Package alarm decides when a unit's approach to a limit becomes an
// alarm an operator must see, and when it stops being one.
//
// Every unit has one state machine per limit. Each machine has two levels
// above normal (warning, critical), each with its own threshold on the
// limit's margin; a deadband that the margin must clear before a level
// falls; an on-delay that a level's condition must hold before it rises;
// and an off-delay that the clear condition must hold before it falls.
// Those are the means ANSI/ISA-18.2 and IEC 62682 (from memory) give
// against chattering alarms: a margin dithering around a threshold raises
// one alarm, not many. The machines run on the samples' own timestamps,
// so a replayed or delayed stream alarms as the plant did; only stale
// telemetry is judged by the wall clock.
//
// The package is pure: no I/O, no clocks, no goroutines.
package alarm

import (
	"fmt"
	"math"
	"time"
)

// Level is how serious an alarm is.
type Level uint8

const (
	Normal   Level = iota // no alarm
	Warning               // the limit is near: act soon
	Critical              // at or past the limit: act now
)

// String returns "normal", "warning" or "critical".
func (l Level) String() string {
	switch l {
	case Normal:
		return "normal"
	case Warning:
		return "warning"
	case Critical:
		return "critical"
	}
	return fmt.Sprintf("Level(%d)", uint8(l))
}

// Kind names what an alarm watches.
type Kind uint8

// The kinds of alarm, in the order of a unit's machines. The first six
// and UEL watch the margins of package limits of the same name.
const (
	Armature Kind = iota
	Field
	Stability
	EndRegion
	PrimeMover
	VoltsPerHertz
	ArmatureThermal      // short-time thermal capability used, armature
	FieldThermal         // short-time thermal capability used, field
	VoltageFrequencyZone // IEC 60034-1 zone B or outside
	StaleTelemetry       // no sample for a while (wall clock)
	FieldCurrentMismatch // measured field current far from the model: a sensor or parameter problem
	UEL                  // the margin above the regulator's underexcitation limiter curve
	OELTimer             // the overexcitation limiter's inverse-time delay running out
	SCLTimer             // the stator current limiter's inverse-time delay running out
	NumKinds
)

var kindNames = [NumKinds]string{
	"armature", "field", "stability", "end_region", "prime_mover", "volts_per_hertz",
	"armature_thermal", "field_thermal", "voltage_frequency_zone", "stale_telemetry", "field_current_mismatch",
	"uel",
	"oel", "scl",
}

// String returns the kind's name, as used in the fleet file, the API and
// the metrics' limit label.
func (k Kind) String() string {
	if k < NumKinds {
		return kindNames[k]
	}
	return fmt.Sprintf("Kind(%d)", uint8(k))
}

// ParseKind returns the kind named s.
func ParseKind(s string) (Kind, bool) {
	for k, n := range kindNames {
		if n == s {
			return Kind(k), true
		}
	}
	return 0, false
}

// Kinds returns every kind, in order.
func Kinds() []Kind {
	ks := make([]Kind, NumKinds)
	for i := range ks {
		ks[i] = Kind(i)
	}
	return ks
}

// Setting is how one alarm of one unit behaves. The thresholds are in the
// unit of the kind's quantity (see Quantity): for the margins a ratio or
// pu, for the thermal alarms the fraction of capability used, for stale
// telemetry seconds, for the field mismatch a fraction of the model's
// current. Warning must be the earlier threshold.
type Setting struct {
	Warning, Critical float64
	Deadband          float64       // the quantity must clear a threshold by this much before its level falls
	OnDelay           time.Duration // a level's condition must hold this long before the level rises
	OffDelay          time.Duration // the clear condition must hold this long before the level falls
	Disabled          bool
}

// Quantity describes what a kind's thresholds are compared with.
type Quantity struct {
	Name   string // for messages
	Unit   string // "" for a ratio
	Rising bool   // true: the alarm is raised when the quantity rises above a threshold; false: when it falls below
}

var quantities = [NumKinds]Quantity{
	{"armature current margin", "", false},
	{"field current margin", "", false},
	{"stability margin", "pu", false},
	{"end-region margin", "pu", false},
	{"prime-mover margin", "", false},
	{"volts-per-hertz margin", "", false},
	{"armature thermal capability used", "", true},
	{"field thermal capability used", "", true},
	{"voltage/frequency zone", "", true},
	{"time since the last sample", "s", true},
	{"field current disagreement with the model", "", true},
	{"UEL margin", "pu", false},
	{"time before the overexcitation limiter acts", "s", false},
	{"time before the stator current limiter acts", "s", false},
}

// QuantityOf returns what kind k's thresholds apply to.
func QuantityOf(k Kind) Quantity { return quantities[k] }

// Rising reports whether kind k alarms when its quantity rises (true) or
// falls (false): QuantityOf(k).Rising without the copy, for the per-sample path.
func Rising(k Kind) bool { return quantities[k].Rising }

// Defaults returns the settings used where the fleet file gives none.
// The margin thresholds warn with 5 % (or 0.05 pu) left and go critical
// at the limit; delays of 5 s on and 30 s off in sample time; the zone
// alarm is warning in zone B (1) and critical outside (2). Common
// practice, no single source; set them to the site's alarm philosophy.
func Defaults() [NumKinds]Setting {
	margin := Setting{Warning: 0.05, Critical: 0, Deadband: 0.01, OnDelay: 5 * time.Second, OffDelay: 30 * time.Second}
	var s [NumKinds]Setting
	for k := Armature; k <= PrimeMover; k++ {
		s[k] = margin
	}
	s[UEL] = margin
	s[VoltsPerHertz] = Setting{Warning: 0.01, Critical: 0, Deadband: 0.005, OnDelay: 5 * time.Second, OffDelay: 30 * time.Second}
	thermal := Setting{Warning: 0.5, Critical: 0.9, Deadband: 0.05, OffDelay: 30 * time.Second}
	s[ArmatureThermal], s[FieldThermal] = thermal, thermal
	s[VoltageFrequencyZone] = Setting{Warning: 1, Critical: 2, OnDelay: 5 * time.Second, OffDelay: 30 * time.Second}
	s[StaleTelemetry] = Setting{Warning: 30, Critical: 120}
	s[FieldCurrentMismatch] = Setting{Warning: 0.10, Critical: 0.20, Deadband: 0.02, OnDelay: 30 * time.Second, OffDelay: 60 * time.Second}
	// The limiter timers are delays already: no on-delay.
	limiter := Setting{Warning: 30, Critical: 10, Deadband: 2, OffDelay: 10 * time.Second}
	s[OELTimer], s[SCLTimer] = limiter, limiter
	return s
}

// Check returns what is wrong with s for kind k, or "".
func (s Setting) Check(k Kind) string {
	fin := func(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
	switch {
	case !fin(s.Warning) || !fin(s.Critical) || !fin(s.Deadband):
		return "thresholds and deadband must be finite numbers"
	case s.Deadband < 0:
		return "deadband must not be negative"
	case s.OnDelay < 0 || s.OffDelay < 0:
		return "delays must not be negative"
	case quantities[k].Rising && s.Critical < s.Warning:
		return fmt.Sprintf("critical (%g) must not be below warning (%g): %s rises towards the limit", s.Critical, s.Warning, quantities[k].Name)
	case !quantities[k].Rising && s.Critical > s.Warning:
		return fmt.Sprintf("critical (%g) must not be above warning (%g): %s falls towards the limit", s.Critical, s.Warning, quantities[k].Name)
	}
	return ""
}

// Machine is the state of one alarm. The zero value is normal. It is a
// plain value: copy it, store it, restore it.
//
// The small fields come first, together, so that the machine packs into
// 64 bytes (a unit holds one per alarm kind).
type Machine struct {
	Level Level

	// For each level above normal, whether its raise condition (or, for
	// a level held, its clear condition) holds and since when (Unix ns).
	Raising      [2]bool
	Clearing     [2]bool
	Acknowledged bool // an operator acknowledged the current level
	RaiseSince   [2]int64
	ClearSince   [2]int64

	ShelvedUntil int64   // wall-clock Unix ns until which the alarm is shelved; 0 when not
	Since        int64   // sample time (Unix ns) of the last level change
	Value        float64 // the quantity at the last step that was not at rest
}

// Step advances the machine to time t (Unix ns) with the quantity x and
// returns the previous level and whether the level changed. A level
// rises one or two steps at once when its condition has held for the
// on-delay, and falls when the clear condition of the level it holds has
// held for the off-delay. A NaN quantity (nothing to compare, such as a
// sample without a field current) holds the level; a disabled setting
// returns the machine to normal.
func (m *Machine) Step(t int64, x float64, s *Setting, rising bool) (prev Level, changed bool) {
	prev = m.Level
	if s.Disabled {
		*m = Machine{ShelvedUntil: m.ShelvedUntil, Since: m.Since}
		if prev != Normal {
			m.Since = t
			return prev, true
		}
		return prev, false
	}
	if math.IsNaN(x) || m.Quiet(x, s, rising) {
		return prev, false
	}
	m.Value = x
	thr := [2]float64{s.Warning, s.Critical}
	// beyond reports whether x is past threshold th, shifted by the
	// deadband towards normal when the level is held (hysteresis).
	beyond := func(th float64, held bool) bool {
		if rising {
			if held {
				th -= s.Deadband
			}
			return x >= th
		}
		if held {
			th += s.Deadband
		}
		return x <= th
	}
	level := Normal
	for i := range 2 {
		held := m.Level > Level(i)
		if beyond(thr[i], held) {
			m.Clearing[i] = false
			if !m.Raising[i] {
				m.Raising[i], m.RaiseSince[i] = true, t
			}
			if held || t-m.RaiseSince[i] >= int64(s.OnDelay) {
				level = Level(i + 1)
			}
		} else {
			m.Raising[i] = false
			if held {
				if !m.Clearing[i] {
					m.Clearing[i], m.ClearSince[i] = true, t
				}
				if t-m.ClearSince[i] < int64(s.OffDelay) {
					level = Level(i + 1)
				}
			}
		}
	}
	if level == m.Level {
		return prev, false
	}
	if level > m.Level {
		m.Acknowledged = false
	}
	m.Level, m.Since = level, t
	if level == Normal {
		m.Acknowledged = false
	}
	return prev, true
}

// Quiet reports whether a step with quantity x would change nothing
// because the alarm is at rest and x is clear of the warning threshold:
// the common case, decided without the general machinery and without
// writing to the machine (Value is kept for alarms that are not at rest).
func (m *Machine) Quiet(x float64, s *Setting, rising bool) bool {
	if m.Level != Normal || m.Raising[0] || m.Raising[1] {
		return false
	}
	if s.Disabled {
		return true
	}
	if rising {
		return x < s.Warning
	}
	return x > s.Warning
}

// Shelved reports whether the alarm is shelved at wall-clock time now (Unix ns).
func (m *Machine) Shelved(now int64) bool { return m.ShelvedUntil > now }
