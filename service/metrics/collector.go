// Package metrics exports the live state of the fleet to Prometheus. The
// collector builds constant metrics at scrape time from each unit's
// latest evaluation, so ingest never touches a gauge; names are in base
// units (watts, vars, volts, amperes, seconds, ratios).
package metrics

import (
	"math"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
)

// Namespace prefixes every metric name.
const Namespace = "genvelope"

// Collector exports the units of a store.
type Collector struct {
	store *ingest.Store
	now   func() time.Time

	info, headroom, margin, binding, feasible, zone        *prometheus.Desc
	activePower, reactivePower, voltage, voltagePU         *prometheus.Desc
	fieldCurrent, loadAngle, cct, thermal, age, sampleTime *prometheus.Desc
	qLimit, accepted, samples, units                       *prometheus.Desc
	alarmLevel, alarmShelved, alarmAcked, transitions      *prometheus.Desc
}

// NewCollector returns a collector over store. now is the clock for
// telemetry age; nil means time.Now.
func NewCollector(store *ingest.Store, now func() time.Time) *Collector {
	if now == nil {
		now = time.Now
	}
	ul := []string{"unit", "site"}
	d := func(name, help string, extra ...string) *prometheus.Desc {
		return prometheus.NewDesc(Namespace+"_"+name, help, append(append([]string{}, ul...), extra...), nil)
	}
	return &Collector{
		store:         store,
		now:           now,
		info:          d("unit_info", "Configured generator (value 1), with its display name and rotor kind.", "name", "rotor"),
		headroom:      d("reactive_headroom_vars", "Reactive power the unit can still deliver (direction=up, to q_max) or absorb (direction=down, to q_min) at its present P, voltage and coolant, var; negative outside the envelope.", "direction"),
		margin:        d("limit_margin_ratio", "Margin to each limit as a ratio, positive inside the envelope (armature 1 - I/Imax, field 1 - Ifd/Ifd_max, stability and end_region (Q - Q_limit)/S_rated, prime_mover (P_max - P)/P_rated, volts_per_hertz 1 - (V/f)/1.05).", "limit"),
		binding:       d("binding_limit", "The capability limit with the smallest margin at the latest sample (value 1).", "limit"),
		feasible:      d("envelope_feasible", "1 when every bound of the envelope exists at the present active power, 0 when one does not (see binding_limit)."),
		zone:          d("voltage_frequency_zone", "IEC 60034-1 operating zone of the latest sample: 0 zone A, 1 zone B, 2 outside both."),
		activePower:   d("active_power_watts", "Active power of the latest sample, W."),
		reactivePower: d("reactive_power_vars", "Reactive power of the latest sample, var (positive overexcited)."),
		voltage:       d("terminal_voltage_volts", "Line-line terminal voltage of the latest sample, V."),
		voltagePU:     d("terminal_voltage_ratio", "Terminal voltage of the latest sample as a ratio of rated voltage."),
		fieldCurrent:  d("field_current_amperes", "Field current, A: measured (source=measured, when the sample carries one) and the machine model's (source=model).", "source"),
		loadAngle:     d("load_angle_radians", "Internal load angle of the latest sample (q axis ahead of the terminal voltage), rad."),
		cct:           d("critical_clearing_time_seconds", "Classical-model critical clearing time of a three-phase fault at the grid side at the latest operating point, s."),
		thermal:       d("thermal_capacity_used_ratio", "Short-time thermal capability used, H/K (IEEE C50.13 law); 1 is the limit.", "winding"),
		age:           d("telemetry_age_seconds", "Time since the unit's latest sample was accepted, by the server clock, s."),
		sampleTime:    d("sample_timestamp_seconds", "Timestamp carried by the unit's latest accepted sample, Unix s."),
		qLimit:        d("reactive_limit_vars", "Reactive power bound at the present P, voltage and coolant, var (bound=upper is q_max, bound=lower is q_min).", "bound"),
		accepted:      d("unit_samples_accepted_total", "Samples accepted for the unit since the service started."),
		samples:       prometheus.NewDesc(Namespace+"_samples_total", "Samples received, by result: accepted, duplicate, or the reason a sample was rejected.", []string{"result"}, nil),
		units:         prometheus.NewDesc(Namespace+"_fleet_units", "Units in the fleet being served.", nil, nil),
		alarmLevel:    d("alarm_level", "Alarm level of each limit of the unit: 0 normal, 1 warning, 2 critical (after the fleet file's thresholds, deadband and delays).", "limit"),
		alarmShelved:  d("alarm_shelved", "1 while an operator has shelved the unit's alarm on this limit.", "limit"),
		alarmAcked:    d("alarm_acknowledged", "1 while the unit's active alarm on this limit is acknowledged.", "limit"),
		transitions:   prometheus.NewDesc(Namespace+"_alarm_transitions_total", "Alarm level changes, by limit and the level reached.", []string{"limit", "level"}, nil),
	}
}

// Describe sends every descriptor.
func (c *Collector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{c.info, c.headroom, c.margin, c.binding, c.feasible, c.zone,
		c.activePower, c.reactivePower, c.voltage, c.voltagePU, c.fieldCurrent, c.loadAngle, c.cct,
		c.thermal, c.age, c.sampleTime, c.qLimit, c.accepted, c.samples, c.units,
		c.alarmLevel, c.alarmShelved, c.alarmAcked, c.transitions} {
		ch <- d
	}
}

// Collect builds the metrics from the store as it is now.
func (c *Collector) Collect(ch chan<- prometheus.Metric) {
	gauge := func(d *prometheus.Desc, v float64, lv ...string) {
		ch <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, v, lv...)
	}
	counts := c.store.Counts()
	for r := ingest.Result(0); r < ingest.NumResults; r++ {
		ch <- prometheus.MustNewConstMetric(c.samples, prometheus.CounterValue, float64(counts[r]), r.String())
	}
	tr := c.store.Transitions()
	for k := range tr {
		for l := alarm.Normal; l <= alarm.Critical; l++ {
			ch <- prometheus.MustNewConstMetric(c.transitions, prometheus.CounterValue, float64(tr[k][l]), alarm.Kind(k).String(), l.String())
		}
	}
	units := c.store.Units()
	gauge(c.units, float64(len(units)))
	now := c.now()
	nowNS := now.UnixNano()
	for _, u := range units {
		v := u.View()
		cfg := v.Config
		id, site := cfg.ID, cfg.Site
		gauge(c.info, 1, id, site, cfg.DisplayName(), cfg.Machine.Rotor.String())
		ch <- prometheus.MustNewConstMetric(c.accepted, prometheus.CounterValue, float64(v.Accepted), id, site)
		gauge(c.thermal, v.Armature.Used(limits.ArmatureK), id, site, "armature")
		gauge(c.thermal, v.Field.Used(limits.FieldK), id, site, "field")
		for k := range v.Alarms {
			m := &v.Alarms[k]
			name := alarm.Kind(k).String()
			gauge(c.alarmLevel, float64(m.Level), id, site, name)
			if m.Shelved(nowNS) {
				gauge(c.alarmShelved, 1, id, site, name)
			}
			if m.Acknowledged && m.Level != alarm.Normal {
				gauge(c.alarmAcked, 1, id, site, name)
			}
		}
		if !v.HasSample {
			continue
		}
		e, s, b := &v.Eval, &v.Latest, cfg.Base
		q := b.PowerPU(s.QMvar)
		up, down := e.Headroom(q)
		if up.OK {
			gauge(c.headroom, b.PowerMW(up.V)*1e6, id, site, "up")
		}
		if down.OK {
			gauge(c.headroom, b.PowerMW(down.V)*1e6, id, site, "down")
		}
		if e.QMax.OK {
			gauge(c.qLimit, b.PowerMW(e.QMax.V)*1e6, id, site, "upper")
		}
		if e.QMin.OK {
			gauge(c.qLimit, b.PowerMW(e.QMin.V)*1e6, id, site, "lower")
		}
		for _, l := range limits.Limits() {
			if m := e.Margins[l]; m.OK {
				gauge(c.margin, m.V, id, site, l.String())
			}
		}
		if e.Binding != limits.NoLimit {
			gauge(c.binding, 1, id, site, e.Binding.String())
		}
		gauge(c.feasible, boolFloat(e.Feasible), id, site)
		gauge(c.zone, float64(e.Zone), id, site)
		gauge(c.activePower, s.PMW*1e6, id, site)
		gauge(c.reactivePower, s.QMvar*1e6, id, site)
		gauge(c.voltage, s.VKV*1e3, id, site)
		gauge(c.voltagePU, b.VoltagePU(s.VKV), id, site)
		if s.HasFieldA {
			gauge(c.fieldCurrent, s.FieldA, id, site, "measured")
		}
		gauge(c.fieldCurrent, b.FieldA(e.IfdModel), id, site, "model")
		pPU, vPU := b.PowerPU(s.PMW), b.VoltagePU(s.VKV)
		gauge(c.loadAngle, cfg.Model.LoadAngle(pPU, q, vPU), id, site)
		if t := cfg.Model.CriticalClearingTime(pPU, q, vPU); t.OK && !math.IsInf(t.V, 0) {
			gauge(c.cct, t.V, id, site)
		}
		gauge(c.age, now.Sub(v.Received).Seconds(), id, site)
		gauge(c.sampleTime, float64(s.Time.UnixNano())/1e9, id, site)
	}
}

func boolFloat(b bool) float64 {
	if b {
		return 1
	}
	return 0
}
