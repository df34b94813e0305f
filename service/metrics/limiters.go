package metrics

import "github.com/genvelope/genvelope/service/ingest"

// The regulator's limiters (coordination.md, "Live").

// limiterFamilies are the limiter metrics.
type limiterFamilies struct {
	used, toAction, current, vhzMargin *family
}

// describeLimiters adds the limiter families; d makes a per-unit family.
func describeLimiters(d func(name, help string, extra ...string) *family) limiterFamilies {
	return limiterFamilies{
		used:      d("limiter_delay_used_ratio", "Fraction of the inverse-time delay of the regulator's limiter (limiter=oel or scl) used at the present current, advanced on sample time; 1 is the limiter acting.", "limiter"),
		toAction:  d("limiter_time_to_action_seconds", "Time until the limiter (limiter=oel or scl) acts if the present current holds, s; present while the current is above its pickup.", "limiter"),
		current:   d("limiter_current_ratio", "The current the limiter acts on as a ratio of its rating (oel: field current of the rated field current; scl: stator current of the rated current).", "limiter"),
		vhzMargin: d("vhz_limiter_margin_ratio", "Margin to the regulator's V/Hz limiter, 1 - (V/f)/setpoint; negative while it acts."),
	}
}

// series adds one unit's limiter series.
func (f limiterFamilies) series(out sink, v *ingest.View, id, site string) {
	for _, l := range []struct {
		name string
		t    ingest.LimiterTimerView
	}{{"oel", v.Limiters.OEL}, {"scl", v.Limiters.SCL}} {
		if !l.t.Configured {
			continue
		}
		out.add(f.used, l.t.Used, lv(id, site, l.name))
		if !v.HasSample {
			continue
		}
		out.add(f.current, l.t.X, lv(id, site, l.name))
		if l.t.Timing {
			out.add(f.toAction, l.t.ToActionS, lv(id, site, l.name))
		}
	}
	if m := v.Limiters.VHzMargin; m.OK {
		out.add(f.vhzMargin, m.V, lv(id, site))
	}
}
