// Package metrics exports the live state of the fleet to Prometheus. The
// collector builds constant metrics at scrape time from each unit's
// latest evaluation, so ingest never touches a gauge; names are in base
// units (watts, vars, volts, amperes, seconds, ratios).
package metrics

import (
	"math"
	"slices"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/report"
)

// Namespace prefixes every metric name.
const Namespace = "genvelope"

// family is one metric family: its name, help, type and label names.
type family struct {
	name    string
	help    string
	counter bool
	labels  []string
	desc    *prometheus.Desc
	index   int  // in Collector.families
	perUnit bool // its first labels are unit and site
	text    familyText
}

// sink receives the series of one scrape.
type sink interface {
	add(f *family, v float64, lv labels)
}

// labels are a series' label values, in the family's order. A value, not
// a slice: passed through the sink interface, a slice would be allocated
// for every series (438,000 a scrape at 10,000 units).
type labels struct {
	v [maxLabels]string
	n int
}

// maxLabels is the most labels a family has (unit_info: unit, site,
// name, rotor).
const maxLabels = 4

// lv makes the labels of a series.
func lv(s ...string) labels {
	var l labels
	l.n = copy(l.v[:], s)
	return l
}

// Collector exports the units of a store. It is a prometheus.Collector,
// and it can also write its families straight to the text format
// (WriteText), which a fleet of thousands of units needs: the registry's
// sorting and encoding cost a hundred times more per series.
type Collector struct {
	store *ingest.Store
	now   func() time.Time

	families []*family

	info, headroom, margin, binding, feasible, zone        *family
	activePower, reactivePower, voltage, voltagePU         *family
	fieldCurrent, loadAngle, cct, thermal, age, sampleTime *family
	qLimit, accepted, samples, units                       *family
	alarmLevel, alarmShelved, alarmAcked, transitions      *family
	rotorFrequency, rotorDamping                           *family
	limiters                                               limiterFamilies // limiters.go
	dataState, suspects                                    *family

	rotor rotorModes // rotormode.go

	chunk int // text handed to the writer at a time (chunkSize; less in tests)
	runs  int // parallel runs of a scrape's walk (0: by the fleet's size and the cores; set in tests)
}

// NewCollector returns a collector over store. now is the clock for
// telemetry age; nil means time.Now.
func NewCollector(store *ingest.Store, now func() time.Time) *Collector {
	if now == nil {
		now = time.Now
	}
	c := &Collector{store: store, now: now, chunk: chunkSize}
	mk := func(name, help string, counter bool, labels ...string) *family {
		if len(labels) > maxLabels {
			panic("metrics: more than maxLabels labels") // a programming error, met at start
		}
		f := &family{name: Namespace + "_" + name, help: help, counter: counter, labels: labels, index: len(c.families),
			perUnit: len(labels) >= 2 && labels[0] == "unit" && labels[1] == "site"}
		if n := len(labels); f.perUnit && n > 4 || !f.perUnit && n > 2 {
			panic("metrics: a family with more labels than a record holds") // a programming error, met at start
		}
		f.desc = prometheus.NewDesc(f.name, help, labels, nil)
		f.text = newFamilyText(f)
		c.families = append(c.families, f)
		return f
	}
	d := func(name, help string, extra ...string) *family {
		return mk(name, help, false, append([]string{"unit", "site"}, extra...)...)
	}
	c.samples = mk("samples_total", "Samples received, by result: accepted, duplicate, or the reason a sample was rejected.", true, "result")
	c.transitions = mk("alarm_transitions_total", "Alarm level changes, by limit and the level reached.", true, "limit", "level")
	c.units = mk("fleet_units", "Units in the fleet being served.", false)
	c.info = d("unit_info", "Configured generator (value 1), with its display name and rotor kind.", "name", "rotor")
	c.accepted = mk("unit_samples_accepted_total", "Samples accepted for the unit since the service started.", true, "unit", "site")
	c.dataState = d("unit_data_state", "1 for the unit's data state, 0 for the others: no_data (never reported), fresh, or stale (no sample for the stale-telemetry warning threshold: its values and thermal state are not known, never normal).", "state")
	c.suspects = mk("unit_suspect_samples_total", "Samples flagged suspect (the first after a gap, or a jump of current no machine makes): their current is held into the thermal accumulators only once a following sample confirms it.", true, "unit", "site")
	c.thermal = d("thermal_capacity_used_ratio", "Short-time thermal capability used, H/K (IEEE C50.13 law); 1 is the limit.", "winding")
	c.alarmLevel = d("alarm_level", "Alarm level of each limit of the unit: 0 normal, 1 warning, 2 critical (after the fleet file's thresholds, deadband and delays).", "limit")
	c.alarmShelved = d("alarm_shelved", "1 while an operator has shelved the unit's alarm on this limit.", "limit")
	c.alarmAcked = d("alarm_acknowledged", "1 while the unit's active alarm on this limit is acknowledged.", "limit")
	c.headroom = d("reactive_headroom_vars", "Reactive power the unit can still deliver (direction=up, to q_max) or absorb (direction=down, to q_min) at its present P, voltage and coolant, var; negative outside the envelope.", "direction")
	c.qLimit = d("reactive_limit_vars", "Reactive power bound at the present P, voltage and coolant, var (bound=upper is q_max, bound=lower is q_min).", "bound")
	c.margin = d("limit_margin_ratio", "Margin to each limit as a ratio, positive inside the envelope (armature 1 - I/Imax, field 1 - Ifd/Ifd_max, stability, end_region and uel (Q - Q_limit)/S_rated, prime_mover min(P_max - P, P - P_min)/P_rated, volts_per_hertz 1 - (V/f)/1.05).", "limit")
	c.binding = d("binding_limit", "The capability limit nearest the latest sample, by distance in pu of rated MVA (value 1).", "limit")
	c.feasible = d("envelope_feasible", "1 when every bound of the envelope exists at the present active power, 0 when one does not (see binding_limit).")
	c.zone = d("voltage_frequency_zone", "IEC 60034-1 operating zone of the latest sample: 0 zone A, 1 zone B, 2 outside both.")
	c.activePower = d("active_power_watts", "Active power of the latest sample, W.")
	c.reactivePower = d("reactive_power_vars", "Reactive power of the latest sample, var (positive overexcited).")
	c.voltage = d("terminal_voltage_volts", "Line-line terminal voltage of the latest sample, V.")
	c.voltagePU = d("terminal_voltage_ratio", "Terminal voltage of the latest sample as a ratio of rated voltage.")
	c.fieldCurrent = d("field_current_amperes", "Field current, A: measured (source=measured, when the sample carries one) and the machine model's (source=model).", "source")
	c.loadAngle = d("load_angle_radians", "Internal load angle of the latest sample (q axis ahead of the terminal voltage), rad.")
	c.cct = d("critical_clearing_time_seconds", "Classical-model critical clearing time of a three-phase fault at the grid side at the latest operating point, s.")
	c.rotorFrequency = d("rotor_mode_frequency_hertz", "Frequency of the rotor (electromechanical) mode of the linearized machine with its regulator at the latest operating point, Hz (units on the avr stability basis; solved at scrape time).")
	c.rotorDamping = d("rotor_mode_damping_ratio", "Damping ratio of the rotor (electromechanical) mode at the latest operating point, -Re/|lambda| (negative: a growing oscillation; units on the avr stability basis).")
	c.age = d("telemetry_age_seconds", "Time since the unit's latest sample was accepted, by the server clock, s.")
	c.sampleTime = d("sample_timestamp_seconds", "Timestamp carried by the unit's latest accepted sample, Unix s.")
	c.limiters = describeLimiters(d)
	return c
}

// Describe sends every descriptor.
func (c *Collector) Describe(ch chan<- *prometheus.Desc) {
	for _, f := range c.families {
		ch <- f.desc
	}
}

// constSink builds const metrics for a registry.
type constSink chan<- prometheus.Metric

func (ch constSink) add(f *family, v float64, l labels) {
	t := prometheus.GaugeValue
	if f.counter {
		t = prometheus.CounterValue
	}
	ch <- prometheus.MustNewConstMetric(f.desc, t, v, l.v[:l.n]...)
}

// Collect builds the metrics from the store as it is now.
func (c *Collector) Collect(ch chan<- prometheus.Metric) { c.series(Filter{}, constSink(ch)) }

// Filter chooses what one scrape serves: the fleet-wide families
// (samples by result, alarm transitions, the number of units) and the
// units whose series it carries. A fleet of 100,000 units is scraped as
// several targets, each a part of the units (see the README, "Metrics
// at scale").
type Filter struct {
	NoFleet bool     // leave out the fleet-wide families
	NoUnits bool     // leave out every unit
	Sites   []string // only these sites' units (none: every site)
	// Shard and Shards: only the units whose id hashes to Shard (0 ≤
	// Shard < Shards) by the 32-bit FNV-1a of the id's bytes modulo
	// Shards; Shards 0 means no sharding.
	Shard, Shards uint32
	// Keep, when set, is the caller's scope: only the units it admits are
	// served, and the unit count is of those (the other fleet-wide
	// counts stay).
	Keep func(unitID string) bool
}

// whole reports whether f serves every unit.
func (f *Filter) whole() bool {
	return !f.NoUnits && len(f.Sites) == 0 && f.Shards == 0 && f.Keep == nil
}

// keeps reports whether the filter serves the unit.
func (f *Filter) keeps(id, site string) bool {
	if f.NoUnits {
		return false
	}
	if len(f.Sites) > 0 && !slices.Contains(f.Sites, site) {
		return false
	}
	if f.Shards > 0 {
		h := uint32(2166136261) // FNV-1a, 32 bits
		for i := 0; i < len(id); i++ {
			h ^= uint32(id[i])
			h *= 16777619
		}
		return h%f.Shards == f.Shard
	}
	return true
}

// series walks the store once and hands every series f serves to
// outs[0], but for the units' series, which go to outs in runs: the
// units cut into len(outs) runs in order, each walked on a goroutine of
// its own (the first on the caller's), so that a sink gets them in the
// store's order.
func (c *Collector) series(f Filter, outs ...sink) {
	out := outs[0]
	c.fleetSeries(out, f)
	units := c.store.Units()
	inScope := len(units) // the units the caller may see
	if f.Keep != nil {
		inScope = 0
		for _, u := range units {
			if f.Keep(u.Config().ID) {
				inScope++
			}
		}
	}
	if !f.NoFleet {
		out.add(c.units, float64(inScope), lv())
	}
	if f.NoUnits {
		return
	}
	now := c.now()
	nowNS := now.UnixNano()
	walk := func(out sink, units []*ingest.Unit) {
		for _, u := range units {
			if !f.whole() {
				cfg := u.Config()
				if f.Keep != nil && !f.Keep(cfg.ID) || !f.keeps(cfg.ID, cfg.Site) {
					continue
				}
			}
			c.unitSeries(out, u, now, nowNS)
		}
	}
	n := len(outs)
	var wg sync.WaitGroup
	for i := 1; i < n; i++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			walk(outs[i], units[i*len(units)/n:(i+1)*len(units)/n])
		}()
	}
	walk(out, units[:len(units)/n])
	wg.Wait()
	if f.whole() {
		c.rotor.endWhole()
	}
}

// unitSink is a sink told which unit's series come next.
type unitSink interface {
	beginUnit(id, site string)
}

// fleetSeries hands the fleet-wide series to out, unless f leaves them out.
func (c *Collector) fleetSeries(out sink, f Filter) {
	if f.NoFleet {
		return
	}
	counts := c.store.Counts()
	for r := ingest.Result(0); r < ingest.NumResults; r++ {
		out.add(c.samples, float64(counts[r]), lv(r.String()))
	}
	tr := c.store.Transitions()
	for k := range tr {
		for l := alarm.Normal; l <= alarm.Critical; l++ {
			out.add(c.transitions, float64(tr[k][l]), lv(alarm.Kind(k).String(), l.String()))
		}
	}
}

// unitSeries hands one unit's series to out.
func (c *Collector) unitSeries(out sink, u *ingest.Unit, now time.Time, nowNS int64) {
	{
		v := u.View()
		cfg := v.Config
		id, site := cfg.ID, cfg.Site
		if us, ok := out.(unitSink); ok {
			us.beginUnit(id, site)
		}
		out.add(c.info, 1, lv(id, site, cfg.DisplayName(), cfg.Machine.Rotor.String()))
		out.add(c.accepted, float64(v.Accepted), lv(id, site))
		for st := ingest.NoData; st < ingest.NumDataStates; st++ {
			out.add(c.dataState, boolFloat(v.Data == st), lv(id, site, st.String()))
		}
		out.add(c.suspects, float64(v.Suspects), lv(id, site))
		out.add(c.thermal, v.Armature.Used(limits.ArmatureK), lv(id, site, "armature"))
		out.add(c.thermal, v.Field.Used(limits.FieldK), lv(id, site, "field"))
		c.limiters.series(out, &v, id, site)
		for k := range v.Alarms {
			m := &v.Alarms[k]
			name := alarm.Kind(k).String()
			out.add(c.alarmLevel, float64(m.Level), lv(id, site, name))
			if m.Shelved(nowNS) {
				out.add(c.alarmShelved, 1, lv(id, site, name))
			}
			if m.Acknowledged && m.Level != alarm.Normal {
				out.add(c.alarmAcked, 1, lv(id, site, name))
			}
		}
		if !v.HasSample {
			return
		}
		e, s, b, pt := &v.Eval, &v.Latest, cfg.Base, &v.Point
		up, down := e.Headroom(pt.Q)
		if up.OK {
			out.add(c.headroom, b.PowerMW(up.V)*1e6, lv(id, site, "up"))
		}
		if down.OK {
			out.add(c.headroom, b.PowerMW(down.V)*1e6, lv(id, site, "down"))
		}
		if e.QMax.OK {
			out.add(c.qLimit, b.PowerMW(e.QMax.V)*1e6, lv(id, site, "upper"))
		}
		if e.QMin.OK {
			out.add(c.qLimit, b.PowerMW(e.QMin.V)*1e6, lv(id, site, "lower"))
		}
		for _, l := range limits.Limits() {
			if m := e.Margins[l]; m.OK {
				out.add(c.margin, m.V, lv(id, site, report.LimitOf(l).Name))
			}
		}
		if e.Binding != limits.NoLimit {
			out.add(c.binding, 1, lv(id, site, report.LimitOf(e.Binding).Name))
		}
		out.add(c.feasible, boolFloat(e.Feasible), lv(id, site))
		out.add(c.zone, float64(e.Zone), lv(id, site))
		out.add(c.activePower, s.PMW*1e6, lv(id, site))
		out.add(c.reactivePower, s.QMvar*1e6, lv(id, site))
		out.add(c.voltage, s.VKV*1e3, lv(id, site))
		out.add(c.voltagePU, pt.V, lv(id, site))
		if s.HasFieldA {
			out.add(c.fieldCurrent, s.FieldA, lv(id, site, "measured"))
		}
		out.add(c.fieldCurrent, b.FieldA(e.IfdModel), lv(id, site, "model"))
		out.add(c.loadAngle, cfg.Model.LoadAngle(pt.P, pt.Q, pt.V), lv(id, site))
		if t := cfg.Model.CriticalClearingTime(pt.P, pt.Q, pt.V); t.OK && !math.IsInf(t.V, 0) {
			out.add(c.cct, t.V, lv(id, site))
		}
		// An eigen decomposition, 100 µs or more: here, at scrape time,
		// never per sample, and again only when the point moved
		// (rotormode.go). Only the avr basis has a rotor mode.
		if cfg.Model.Params().Basis == limits.BasisAVR {
			if m, ok := c.rotor.get(u, cfg.Model, *pt); ok {
				out.add(c.rotorFrequency, m.FrequencyHz, lv(id, site))
				out.add(c.rotorDamping, m.DampingRatio, lv(id, site))
			}
		}
		out.add(c.age, now.Sub(v.Received).Seconds(), lv(id, site))
		out.add(c.sampleTime, float64(s.Time.UnixNano())/1e9, lv(id, site))
	}
}

func boolFloat(b bool) float64 {
	if b {
		return 1
	}
	return 0
}
