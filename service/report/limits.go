package report

import (
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
)

// Side is which bound of the operating point a limit sets.
type Side uint8

const (
	SideUpperQ     Side = iota + 1 // q_max: the overexcited side
	SideLowerQ                     // q_min: the underexcited side
	SideBothQ                      // q_max and q_min (the armature circle)
	SideActive                     // p_max
	SideExcitation                 // neither P nor Q: the excitation (volts per hertz)
)

// String returns the bound's name as used in the JSON keys.
func (s Side) String() string {
	switch s {
	case SideUpperQ:
		return "q_max"
	case SideLowerQ:
		return "q_min"
	case SideBothQ:
		return "q_max and q_min"
	case SideActive:
		return "p_max"
	case SideExcitation:
		return "v/f"
	}
	return "none"
}

// LimitInfo is one limit as every output names it. Name is the only
// spelling of a limit in JSON, in the metrics' limit label, in the fleet
// file's alarm settings and in AlarmEvent.limit; the gRPC enum value is
// LIMIT_ followed by Name in capitals (see service/rpc).
type LimitInfo struct {
	Limit limits.Limit
	Name  string     // "end_region"
	Title string     // "Stator end region", in the operators' words
	Basis string     // what the margin is a fraction of
	Side  Side       // which bound the limit sets
	Alarm alarm.Kind // the alarm that watches its margin; alarm.NumKinds for none
}

// limitTable is the one table of the limits with a margin, in
// limits.Limits order. It is never written.
var limitTable = [...]LimitInfo{
	{limits.LimitArmature, "armature", "Armature current", "of the armature current rating", SideBothQ, alarm.Armature},
	{limits.LimitField, "field", "Field current", "of the field current rating", SideUpperQ, alarm.Field},
	{limits.LimitStability, "stability", "Steady-state stability", "of rated MVA, above the practical limit", SideLowerQ, alarm.Stability},
	{limits.LimitEndRegion, "end_region", "Stator end region", "of rated MVA, above the end-region curve", SideLowerQ, alarm.EndRegion},
	{limits.LimitPrimeMover, "prime_mover", "Prime mover", "of rated MW, inside p_min to p_max", SideActive, alarm.PrimeMover},
	{limits.LimitVoltsPerHertz, "volts_per_hertz", "Volts per hertz", "below 1.05 pu continuous", SideExcitation, alarm.VoltsPerHertz},
	{limits.LimitUEL, "uel", "Underexcitation limiter", "of rated MVA, above the UEL curve", SideLowerQ, alarm.UEL},
}

// Limits returns the table of every limit with a margin, in
// limits.Limits order.
func Limits() []LimitInfo { return limitTable[:] }

// LimitOf returns limit l's entry. A limit the table does not know (one
// added to the engine and not yet here) gets its engine name as title
// and no alarm.
func LimitOf(l limits.Limit) LimitInfo {
	for i := range limitTable {
		if limitTable[i].Limit == l {
			return limitTable[i]
		}
	}
	return LimitInfo{Limit: l, Name: l.String(), Title: l.String(), Alarm: alarm.NumKinds}
}

// LimitNamed returns the entry of the limit called name.
func LimitNamed(name string) (LimitInfo, bool) {
	for i := range limitTable {
		if limitTable[i].Name == name {
			return limitTable[i], true
		}
	}
	return LimitInfo{}, false
}

// LimitOfAlarm returns the limit whose margin alarm k watches, or
// limits.NoLimit for an alarm that watches something else. It does not
// allocate: the per-sample path calls it.
func LimitOfAlarm(k alarm.Kind) limits.Limit {
	if k < alarm.NumKinds {
		return limitByAlarm[k]
	}
	return limits.NoLimit
}

// limitByAlarm is LimitOfAlarm as an array indexed by alarm kind, made
// once from limitTable and never changed: one load per alarm per sample
// instead of a search of the table.
var limitByAlarm = func() (a [alarm.NumKinds]limits.Limit) {
	for k := range a {
		a[k] = limits.NoLimit
		for i := range limitTable {
			if limitTable[i].Alarm == alarm.Kind(k) {
				a[k] = limitTable[i].Limit
				break
			}
		}
	}
	return a
}()

// AlarmTitle names alarm kind k in the operators' words: a margin alarm
// by its limit's title.
func AlarmTitle(k alarm.Kind) string {
	if l := LimitOfAlarm(k); l != limits.NoLimit {
		return LimitOf(l).Title
	}
	switch k {
	case alarm.ArmatureThermal:
		return "Armature short-time heating"
	case alarm.FieldThermal:
		return "Field short-time heating"
	case alarm.VoltageFrequencyZone:
		return "Voltage/frequency zone"
	case alarm.StaleTelemetry:
		return "Telemetry stale"
	case alarm.FieldCurrentMismatch:
		return "Field current vs model"
	case alarm.OELTimer:
		return "Overexcitation limiter"
	case alarm.SCLTimer:
		return "Stator current limiter"
	}
	return k.String()
}
