package demo

import (
	"fmt"
	"math"
	"slices"
	"time"

	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

// DefaultDay is how long one simulated day lasts at speed 1.
const DefaultDay = 20 * time.Minute

// Episode is one event of the simulated day.
type Episode struct {
	Name     string  // drift, field-overload, frozen-sensor, outage, high-voltage, low-voltage
	Unit     string  // the unit it happens to; "" for a voltage excursion of a whole site
	Site     string  // the site of a voltage excursion
	From, To float64 // when, as fractions of the simulated day
	// Alarms are the alarms it is meant to raise (one of them, for the
	// underexcited drift: whichever limit sets q_min there).
	Alarms []string
	About  string // what happens, in a sentence

	ramp float64 // fraction of the day over which it sets in, and over which it ends
}

// The episode names.
const (
	EpisodeDrift         = "drift"
	EpisodeFieldOverload = "field-overload"
	EpisodeFrozenSensor  = "frozen-sensor"
	EpisodeOutage        = "outage"
	EpisodeHighVoltage   = "high-voltage"
	EpisodeLowVoltage    = "low-voltage"
)

// MinDay and MaxDay bound the length of a simulated day.
const (
	MinDay = 10 * time.Minute
	MaxDay = 24 * time.Hour
)

// Episodes returns the script of a simulated day lasting day, in the
// order the episodes begin; it repeats every day. The slow episodes (the
// drift, the frozen sensor, the voltage excursions) take a share of the
// day. The field overload and the telemetry outage last a fixed time,
// because what they show runs on real seconds: the thermal memory
// accumulates over sample time and stale telemetry is judged by the
// wall clock.
func Episodes(day time.Duration) []Episode {
	secs := func(s float64) float64 { return s / day.Seconds() }
	return []Episode{
		{Name: EpisodeDrift, Unit: "vessa-2", From: 0.04, To: 0.22, ramp: 0.075,
			Alarms: []string{"stability", "end_region"},
			About:  "at light load before dawn its excitation drifts down until it sits on its underexcited limit, then recovers"},
		{Name: EpisodeFrozenSensor, Unit: "tillmoor-st1", From: 0.18, To: 0.40,
			Alarms: []string{"field_current_mismatch"},
			About:  "its field current transducer freezes through the morning ramp: the reading stays put while the load rises"},
		{Name: EpisodeHighVoltage, Site: "vessa-falls", From: 0.42, To: 0.48, ramp: 0.012,
			Alarms: []string{"volts_per_hertz"},
			About:  "the valley's network runs high: terminal voltage 1.046 pu, close to the volts-per-hertz limit"},
		{Name: EpisodeOutage, Unit: "quarrendon-1", From: 0.50, To: 0.50 + secs(120),
			Alarms: []string{"stale_telemetry"},
			About:  "its telemetry link goes down for two minutes"},
		{Name: EpisodeFieldOverload, Unit: "ashgrove-1", From: 0.62, To: 0.62 + secs(170), ramp: secs(18),
			Alarms: []string{"field", "field_thermal"},
			About:  "after a line trips it is cut back to minimum load and asked for all the Mvar it has: its field runs 8 % over rating for two minutes, the field's thermal memory fills, then empties"},
		{Name: EpisodeLowVoltage, Site: "tillmoor", From: 0.84, To: 0.90, ramp: 0.012,
			Alarms: []string{"voltage_frequency_zone"},
			About:  "a transformer outage leaves the site's voltage at 0.935 pu, in zone B"},
	}
}

// Episodes returns the scenario's script.
func (s *Scenario) Episodes() []Episode { return slices.Clone(s.episodes) }

// Episode returns the episode of the given name, and whether there is one.
func (s *Scenario) Episode(name string) (Episode, bool) {
	for _, e := range s.episodes {
		if e.Name == name {
			return e, true
		}
	}
	return Episode{}, false
}

// weight returns how far the episode has set in at day fraction x: 0
// outside it, 1 in full, with smooth ramps.
func (e *Episode) weight(x float64) float64 {
	if x < e.From || x >= e.To {
		return 0
	}
	if e.ramp <= 0 {
		return 1
	}
	in := (x - e.From) / e.ramp
	out := (e.To - x) / e.ramp
	return smoothstep(math.Min(1, math.Min(in, out)))
}

func smoothstep(t float64) float64 {
	t = math.Max(0, math.Min(1, t))
	return t * t * (3 - 2*t)
}

// profile is how a unit is dispatched.
type profile struct {
	lo, hi float64 // its share of its P range (p_min to p_max) at load factor 0 and 1
	qBias  float64 // its reactive set point, as a fraction of the range from q_min to q_max
	phase  float64 // sets its wobble apart from the other units'
}

// profileOf returns the dispatch of the demo fleet's unit id.
func profileOf(id string) (profile, bool) {
	p, ok := map[string]profile{
		"ashgrove-1":   {lo: 0.25, hi: 0.85, qBias: 0.58, phase: 0.11},
		"ashgrove-2":   {lo: 0.30, hi: 0.85, qBias: 0.56, phase: 0.37},
		"tillmoor-gt1": {lo: 0.05, hi: 0.85, qBias: 0.55, phase: 0.59},
		"tillmoor-st1": {lo: 0.15, hi: 0.90, qBias: 0.55, phase: 0.83},
		"vessa-1":      {lo: 0.05, hi: 0.80, qBias: 0.52, phase: 0.19},
		"vessa-2":      {lo: 0.05, hi: 0.80, qBias: 0.52, phase: 0.71},
		"quarrendon-1": {lo: 0.10, hi: 0.85, qBias: 0.55, phase: 0.43},
		"quarrendon-2": {lo: 0.12, hi: 0.82, qBias: 0.55, phase: 0.97},
	}[id]
	return p, ok
}

// Scenario is the demo's script over the demo fleet. A sample is a pure
// function of the scenario time, so that the same time always gives the
// same sample.
type Scenario struct {
	day      float64 // s
	units    []simUnit
	episodes []Episode
}

type simUnit struct {
	cfg  *fleet.Unit
	prof profile
	// The episodes of this unit and of its site, nil when none.
	drift, overload, frozen, outage, voltage *Episode
	vTarget                                  float64 // pu, the voltage of its site's excursion
}

// NewScenario returns the script over fl, which must be the demo fleet,
// with one simulated day lasting day.
func NewScenario(fl *fleet.Fleet, day time.Duration) (*Scenario, error) {
	if day < MinDay || day > MaxDay {
		return nil, fmt.Errorf("a simulated day of %s: it must last %s to %s", day, MinDay, MaxDay)
	}
	s := &Scenario{day: day.Seconds(), episodes: Episodes(day)}
	for _, u := range fl.Units {
		prof, ok := profileOf(u.ID)
		if !ok || u.Model == nil {
			return nil, fmt.Errorf("unit %q is not one of the demo fleet's", u.ID)
		}
		su := simUnit{cfg: u, prof: prof}
		for i := range s.episodes {
			e := &s.episodes[i]
			if e.Unit != "" && e.Unit != u.ID || e.Site != "" && e.Site != u.Site {
				continue
			}
			switch e.Name {
			case EpisodeDrift:
				su.drift = e
			case EpisodeFieldOverload:
				su.overload = e
			case EpisodeFrozenSensor:
				su.frozen = e
			case EpisodeOutage:
				su.outage = e
			case EpisodeHighVoltage:
				su.voltage, su.vTarget = e, 1.046
			case EpisodeLowVoltage:
				su.voltage, su.vTarget = e, 0.935
			}
		}
		s.units = append(s.units, su)
	}
	for _, e := range s.episodes {
		if e.Unit != "" && fl.Unit(e.Unit) == nil {
			return nil, fmt.Errorf("episode %s: unit %q is not in the fleet", e.Name, e.Unit)
		}
	}
	return s, nil
}

// Day returns how long one simulated day lasts, in scenario time.
func (s *Scenario) Day() time.Duration { return time.Duration(s.day * float64(time.Second)) }

// Samples returns the samples of every reporting unit at scenario time
// tau (seconds from the start of the first simulated day), stamped at.
func (s *Scenario) Samples(tau float64, at time.Time) []*pb.Sample {
	ts := timestamppb.New(at)
	out := make([]*pb.Sample, 0, len(s.units))
	for i := range s.units {
		op, ok := s.operate(&s.units[i], tau, true)
		if !ok {
			continue
		}
		smp := &pb.Sample{UnitId: s.units[i].cfg.ID, Time: ts, PMw: op.pMW, QMvar: op.qMvar, VKv: op.vKV,
			FieldA: ptr(op.fieldA), FrequencyHz: ptr(op.freqHz)}
		if op.hasCoolant {
			smp.Coolant = ptr(op.coolant)
		}
		out = append(out, smp)
	}
	return out
}

func ptr(x float64) *float64 { return &x }

// operating is one unit's simulated measurement.
type operating struct {
	pMW, qMvar, vKV, fieldA, freqHz float64
	coolant                         float64
	hasCoolant                      bool
}

// operate returns unit u's measurement at scenario time tau, and false
// while it does not report. Without episodes it is the unit's normal
// dispatch; withFreeze false leaves out the frozen sensor (to find the
// value it freezes at).
func (s *Scenario) operate(u *simUnit, tau float64, withFreeze bool) (operating, bool) {
	days := tau / s.day
	x := days - math.Floor(days)
	if u.outage != nil && u.outage.weight(x) > 0 {
		return operating{}, false
	}
	cfg, m := u.cfg, u.cfg.Model
	b := cfg.Base
	pr := m.Params()
	ph := u.prof.phase

	lf := loadFactor(x)
	share := u.prof.lo + (u.prof.hi-u.prof.lo)*lf
	p := (pr.PMin + (pr.PMax-pr.PMin)*share) * (1 + 0.003*wobble(x, ph))

	v := siteVoltage(cfg.Site, x) + 0.002*wobble(x, ph+0.5)
	if u.voltage != nil {
		w := u.voltage.weight(x)
		v = (1-w)*v + w*(u.vTarget+0.001*wobble(x, ph+0.25))
	}
	f := 1 + 0.0006*math.Sin(2*math.Pi*7*x) + 0.0003*math.Sin(2*math.Pi*(31*x+0.2))

	var op operating
	armF, fieldF := 1.0, 1.0
	if cfg.Coolant != nil {
		switch cfg.Coolant.Quantity {
		case fleet.HydrogenPressureKPa:
			op.coolant = 448 + 1.5*math.Sin(2*math.Pi*(3*x+ph))
		default: // ambient or cold gas: a day's temperature swing, 6 °C before dawn to 28 °C in the afternoon
			op.coolant = 17 - 11*math.Cos(2*math.Pi*(x-0.12))
		}
		op.hasCoolant = true
		armF, fieldF, _ = m.CoolantFactors(op.coolant)
	}

	// The reactive set point: a share of the unit's present range, a
	// little more at high load and less when the network's voltage is
	// high, as a voltage schedule would have it.
	normalQ := func(p float64) (float64, limits.Bounds) {
		bd := m.Bounds(p, v, armF, fieldF, nil)
		if !bd.QMin.OK || !bd.QMax.OK {
			return 0, bd
		}
		fq := u.prof.qBias + 0.1*(share-0.5) - 2.5*(v-1) + 0.01*wobble(x, ph+0.75)
		return bd.QMin.V + fq*(bd.QMax.V-bd.QMin.V), bd
	}
	q, bd := normalQ(p)

	if e := u.drift; e != nil {
		if w := e.weight(x); w > 0 && bd.QMin.OK {
			q = (1-w)*q + w*(bd.QMin.V-0.005) // ends just past the limit: critical
		}
	}
	if e := u.overload; e != nil {
		if w := e.weight(x); w > 0 {
			// Active power eases to near the prime mover's minimum (20 % above
			// it, clear of the prime-mover alarm), where the
			// armature has room left above the field limit; the field is
			// then driven to 108 % of its rating.
			p = (1-w)*p + w*pr.PMin*1.2
			q, _ = normalQ(p)
			over := m.Bounds(p, v, armF, fieldF*1.08, nil)
			if over.Field.OK {
				qo := over.Field.V
				if over.ArmatureUp.OK {
					qo = math.Min(qo, 0.93*over.ArmatureUp.V)
				}
				q = (1-w)*q + w*qo
			}
		}
	}

	op.pMW, op.qMvar, op.vKV = b.PowerMW(p), b.PowerMW(q), b.VoltageKV(v)
	op.freqHz = cfg.Rating.FrequencyHz * f
	op.fieldA = b.FieldA(m.FieldCurrent(p, q, v)) * (1 + 0.003*wobble(x, ph+0.1))
	if e := u.frozen; e != nil && withFreeze && e.weight(x) > 0 {
		// The reading stays at what it was when the transducer froze.
		start := (math.Floor(days) + e.From) * s.day
		if fz, ok := s.operate(u, start, false); ok {
			op.fieldA = fz.fieldA
		}
	}
	return op, true
}

// loadFactor is the system's daily demand, 0 (night minimum) to 1
// (evening peak), at day fraction x: a night trough, a morning ramp, a
// midday plateau with an afternoon dip and an evening peak. Cosine
// interpolation between the points, periodic over the day.
func loadFactor(x float64) float64 {
	pts := [...][2]float64{
		{0, 0.22}, {0.12, 0.05}, {0.22, 0.10}, {0.35, 0.72}, {0.50, 0.80},
		{0.60, 0.68}, {0.75, 1.0}, {0.85, 0.62}, {1, 0.22},
	}
	for i := 1; i < len(pts); i++ {
		if x <= pts[i][0] {
			a, b := pts[i-1], pts[i]
			t := (x - a[0]) / (b[0] - a[0])
			return a[1] + (b[1]-a[1])*(1-math.Cos(math.Pi*t))/2
		}
	}
	return pts[0][1]
}

// siteVoltage is a site's network voltage without excursions, pu: a
// slow swing of about 1 % over the day, each site in its own phase.
func siteVoltage(site string, x float64) float64 {
	var ph float64
	for _, c := range site {
		ph += float64(c)
	}
	ph = math.Mod(ph/97, 1)
	return 1.002 + 0.01*math.Sin(2*math.Pi*(x+ph)) + 0.003*math.Sin(2*math.Pi*(5*x+ph))
}

// wobble is a deterministic stand-in for measurement noise, in [-1, 1]:
// a few incommensurate sines of the day fraction.
func wobble(x, phase float64) float64 {
	return 0.5*math.Sin(2*math.Pi*(113*x+phase)) + 0.3*math.Sin(2*math.Pi*(271*x+2.3*phase)) + 0.2*math.Sin(2*math.Pi*(643*x+5.1*phase))
}
