package alarm

import (
	"fmt"
	"math"
	"strings"
	"time"
)

// Change says what an event reports.
type Change uint8

const (
	LevelChanged Change = iota // the level rose or fell
	Acknowledged               // an operator acknowledged the alarm
	Shelved                    // an operator shelved the alarm until a time
	Unshelved                  // the shelf was lifted or expired
)

// String returns "level", "acknowledged", "shelved" or "unshelved".
func (c Change) String() string {
	return [...]string{"level", "acknowledged", "shelved", "unshelved"}[c]
}

// Event is one change of one alarm.
type Event struct {
	Unit, Site string
	Kind       Kind
	Change     Change
	Level      Level
	Prev       Level
	Time       time.Time // the sample's time (wall clock for stale telemetry and operator actions)
	Value      float64   // the quantity (see QuantityOf)
	// Actual and LimitAt are what the alarm watches and the limit it is
	// held against, in engineering units named by Units (A, Mvar, MW,
	// kV, pu, s): for example Q and q_min in Mvar for the stability alarm.
	Actual, LimitAt float64
	Units           string
	Threshold       float64   // the threshold of the level reached, or of the level left when falling
	Shelved         time.Time // until when the alarm is shelved; zero when it is not
	Acknowledged    bool      // the active alarm is acknowledged
	Message         string    // one plain sentence an operator can act on
	Operator        string    // who acted, for acknowledgements and shelves
	Removed         bool      // the alarm ended because a reload removed its unit
}

// Context is the operating point behind an alarm, in engineering units,
// for its message. A nil pointer is a value that does not exist.
type Context struct {
	PMW, QMvar, VKV    float64
	QMaxMvar, QMinMvar *float64
	QMaxLimit          string // the limit setting q_max: "field" or "armature"
	QMinLimit          string // the limit setting q_min: "stability", "end_region", "uel" or "armature"
	PMaxMW, PMinMW     float64
	// LimitMvar is the alarm's own underexcited limit at the point (the
	// practical stability limit, the end-region or the UEL curve), Mvar;
	// NaN when it has no value there. Read for those kinds only.
	LimitMvar    float64
	IfdMeasuredA *float64
	IfdModelA    float64
	AgeS         float64
	Zone         string
	VPerHzPU     float64
	NoData       bool    // the unit has never reported
	OELXPU       float64 // the currents the limiters act on, pu of their ratings
	SCLXPU       float64
}

// Message returns the operator's sentence for a level change of kind k
// of unit id, from the operating point c.
func Message(id string, k Kind, level, prev Level, value float64, c *Context) string {
	if level == Normal {
		return fmt.Sprintf("%s: %s back to normal (was %s).", id, kindTitle(k), prev)
	}
	at := fmt.Sprintf("at %.1f MW, %.2f kV", c.PMW, c.VKV)
	switch k {
	case Armature:
		return fmt.Sprintf("%s: armature current at %.0f %% of its rating %s; reduce the reactive (or active) load.", id, 100*(1-value), at)
	case Field:
		if c.QMaxMvar != nil && c.QMaxLimit == "field" {
			return fmt.Sprintf("%s: %s the field current limit (q_max %.1f Mvar) %s; reduce excitation or move reactive load to other units.",
				id, leftOrBeyond(*c.QMaxMvar-c.QMvar, "Mvar", "before"), *c.QMaxMvar, at)
		}
		return fmt.Sprintf("%s: field current at %.0f %% of its rating %s; reduce excitation or move reactive load to other units.", id, 100*(1-value), at)
	case Stability, EndRegion, UEL:
		what := map[Kind]string{Stability: "practical stability limit", EndRegion: "stator end-region limit", UEL: "underexcitation limiter curve"}[k]
		lim, ok := c.LimitMvar, !math.IsNaN(c.LimitMvar)
		if c.QMinLimit == k.String() && c.QMinMvar != nil {
			lim, ok = *c.QMinMvar, true // the limit that sets q_min
		}
		if !ok {
			if k == Stability {
				return fmt.Sprintf("%s: no stable underexcited range %s (%s); raise excitation or reduce load now.", id, at, what)
			}
			return fmt.Sprintf("%s: the %s has no value %s.", id, what, at)
		}
		return fmt.Sprintf("%s: %s the %s (%.1f Mvar) %s; raise excitation or absorb less reactive power.",
			id, leftOrBeyond(c.QMvar-lim, "Mvar", "above"), what, lim, at)
	case PrimeMover:
		if c.PMW < c.PMinMW {
			return fmt.Sprintf("%s: %s the prime mover's minimum %.1f MW %s; raise the active-power set point or take the unit off.",
				id, leftOrBeyond(c.PMW-c.PMinMW, "MW", "above"), c.PMinMW, at)
		}
		return fmt.Sprintf("%s: %s the prime mover's %.1f MW %s; reduce the active-power set point.", id, leftOrBeyond(c.PMaxMW-c.PMW, "MW", "to"), c.PMaxMW, at)
	case VoltsPerHertz:
		return fmt.Sprintf("%s: volts per hertz %.3f pu against 1.05 pu continuous %s; lower the terminal voltage or check the frequency.", id, c.VPerHzPU, at)
	case ArmatureThermal, FieldThermal:
		w := map[Kind]string{ArmatureThermal: "armature", FieldThermal: "field"}[k]
		return fmt.Sprintf("%s: %.0f %% of the %s winding's short-time thermal capability used %s; bring the %s current below its rating.", id, 100*value, w, at, w)
	case VoltageFrequencyZone:
		return fmt.Sprintf("%s: operating in %s of the voltage/frequency zones %s; limit the time spent there and bring voltage back within ±5 %%.", id, zoneWords(c.Zone), at)
	case StaleTelemetry:
		if c.NoData {
			return fmt.Sprintf("%s: no sample received in the %.0f s since the service started: no data, its limits are not being watched; check the SCADA link.", id, c.AgeS)
		}
		return fmt.Sprintf("%s: no sample for %.0f s; its limits are not being watched; check the SCADA link.", id, c.AgeS)
	case OELTimer:
		return fmt.Sprintf("%s: OEL will act in %.0f s at %.2f pu field current %s; reduce excitation (deliver fewer Mvar) before the limiter takes it down.", id, value, c.OELXPU, at)
	case SCLTimer:
		return fmt.Sprintf("%s: SCL will act in %.0f s at %.2f pu stator current %s; bring the reactive power towards zero before the limiter does.", id, value, c.SCLXPU, at)
	case FieldCurrentMismatch:
		meas := "?"
		if c.IfdMeasuredA != nil {
			meas = fmt.Sprintf("%.0f A", *c.IfdMeasuredA)
		}
		return fmt.Sprintf("%s: measured field current %s differs from the model's %.0f A by %.0f %% %s; check the field current transducer and the unit's parameters.",
			id, meas, c.IfdModelA, 100*value, at)
	}
	return fmt.Sprintf("%s: %s %s.", id, k, level)
}

// leftOrBeyond says how far a quantity is from its limit in words that
// are never negative: "3.8 Mvar left above", or "0.5 Mvar beyond" once
// past it.
func leftOrBeyond(left float64, unit, prep string) string {
	if left < 0 {
		return fmt.Sprintf("%.1f %s beyond", -left, unit)
	}
	return fmt.Sprintf("%.1f %s left %s", left, unit, prep)
}

func kindTitle(k Kind) string { return strings.ReplaceAll(k.String(), "_", " ") }

func zoneWords(z string) string {
	if z == "B" {
		return "zone B"
	}
	return "neither zone A nor zone B"
}
