package fleet

import (
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/service/alarm"
)

// The alarms: block, at the top of the file (defaults for every unit) and
// in a unit (that unit's own settings, on top of the defaults):
//
//	alarms:
//	  on_delay_s: 5          # for every limit of the block, unless the limit says otherwise
//	  off_delay_s: 30
//	  limits:
//	    stability: {warning: 0.08, critical: 0.02, deadband: 0.01, on_delay_s: 10, off_delay_s: 60}
//	    stale_telemetry: {warning: 30, critical: 120}
//	    field_current_mismatch: {enabled: false}
//
// Thresholds are in the unit of each limit's quantity (alarm.QuantityOf):
// margins as ratios or pu, thermal alarms as the fraction of capability
// used, stale telemetry in seconds, the field mismatch as a fraction.

var alarmLimitKeys = []string{"warning", "critical", "deadband", "on_delay_s", "off_delay_s", "enabled"}

func (d *decoder) decodeFleetAlarms(v *yaml.Node, line int) {
	c := &unitCtx{d: d, u: &Unit{line: line, paths: d.paths}}
	c.decodeAlarmsInto(v, "alarms", line, &d.fleet.Alarms)
}

func (c *unitCtx) decodeAlarms(v *yaml.Node, path string, line int) {
	c.u.Alarms = c.d.fleet.Alarms
	c.decodeAlarmsInto(v, path, line, &c.u.Alarms)
}

func (c *unitCtx) decodeAlarmsInto(v *yaml.Node, path string, line int, s *[alarm.NumKinds]alarm.Setting) {
	m, ok := c.open(v, path, line, "on_delay_s", "off_delay_s", "limits")
	if !ok {
		return
	}
	if x, ok := c.number(m, "on_delay_s", false, "the on-delay in seconds of sample time", nonNegative); ok {
		for k := range s {
			s[k].OnDelay = seconds(x)
		}
	}
	if x, ok := c.number(m, "off_delay_s", false, "the off-delay in seconds of sample time", nonNegative); ok {
		for k := range s {
			s[k].OffDelay = seconds(x)
		}
	}
	lv, lline, present := m.get("limits")
	if !present {
		return
	}
	names := make([]string, alarm.NumKinds)
	for i, k := range alarm.Kinds() {
		names[i] = k.String()
	}
	lm, ok := c.open(lv, path+".limits", lline, names...)
	if !ok {
		return
	}
	for _, k := range alarm.Kinds() {
		kv, kline, present := lm.get(k.String())
		if !present {
			continue
		}
		kpath := path + ".limits." + k.String()
		km, ok := c.open(kv, kpath, kline, alarmLimitKeys...)
		if !ok {
			continue
		}
		set := s[k]
		q := alarm.QuantityOf(k)
		what := "the threshold on the " + q.Name
		if q.Unit != "" {
			what += " in " + q.Unit
		}
		if x, ok := c.number(km, "warning", false, what, nil); ok {
			set.Warning = x
		}
		if x, ok := c.number(km, "critical", false, what, nil); ok {
			set.Critical = x
		}
		if x, ok := c.number(km, "deadband", false, "the deadband, in the threshold's unit", nonNegative); ok {
			set.Deadband = x
		}
		if x, ok := c.number(km, "on_delay_s", false, "the on-delay in seconds of sample time", nonNegative); ok {
			set.OnDelay = seconds(x)
		}
		if x, ok := c.number(km, "off_delay_s", false, "the off-delay in seconds of sample time", nonNegative); ok {
			set.OffDelay = seconds(x)
		}
		if b, ok := c.boolean(km, "enabled"); ok {
			set.Disabled = !b
		}
		if msg := set.Check(k); msg != "" {
			c.errorf(c.lineOf(km, kline), kpath, "%s", msg)
			continue
		}
		s[k] = set
	}
}

// lineOf returns the line of the mapping's first key, or line.
func (c *unitCtx) lineOf(m *mapping, line int) int {
	for _, k := range alarmLimitKeys {
		if _, l, ok := m.get(k); ok {
			return l
		}
	}
	return line
}

// boolean reads true or false at key.
func (c *unitCtx) boolean(m *mapping, key string) (bool, bool) {
	field := join(m.path, key)
	v, line, present := m.get(key)
	if !present {
		return false, false
	}
	n := resolve(v)
	if n.Kind == yaml.ScalarNode && n.Tag == "!!bool" {
		var b bool
		if err := n.Decode(&b); err == nil {
			c.setOK(field)
			return b, true
		}
	}
	c.errorf(line, field, "must be true or false; got %s", describe(n))
	return false, false
}

func seconds(x float64) time.Duration { return time.Duration(x * float64(time.Second)) }
