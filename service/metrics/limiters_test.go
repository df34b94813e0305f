package metrics

import (
	"math"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/ingest"
)

// TestLimiterSeries: with harrowmere-1's field at 1.38 pu of its rated
// current for 5 s of sample time, the OEL (pickup 1.05, k_s 15) has used
// 5/t of its delay, t = 15/((1.38/1.05)^2 - 1) (coordination.md), and
// has t - 5 s left; the SCL is configured but not timing.
func TestLimiterSeries(t *testing.T) {
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	s := ingest.NewStore(fl, ingest.Options{})
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	at := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	for i := -1; i <= 5; i++ { // the sample at -1 s confirms the field current (a first sample is suspect)
		smp := ingest.Sample{UnitID: "harrowmere-1", Time: at.Add(time.Duration(i) * time.Second), PMW: 300, QMvar: 120, VKV: 20,
			FieldA: 1.38 * ratedA, HasFieldA: true, Coolant: 414, HasCoolant: true}
		if r, d := s.Accept(at, &smp); r != ingest.Accepted {
			t.Fatalf("%v %s", r, d)
		}
	}
	reg := prometheus.NewPedanticRegistry()
	reg.MustRegister(NewCollector(s, nil))
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	law := 15 / ((1.38/1.05)*(1.38/1.05) - 1)
	got := map[string]float64{}
	for _, mf := range mfs {
		for _, m := range mf.GetMetric() {
			key := mf.GetName()
			for _, lp := range m.GetLabel() {
				if lp.GetName() == "unit" && lp.GetValue() != "harrowmere-1" {
					key = ""
				}
				if lp.GetName() == "limiter" {
					key += "/" + lp.GetValue()
				}
			}
			if key != "" {
				got[key] = m.GetGauge().GetValue()
			}
		}
	}
	for _, c := range []struct {
		key  string
		want float64
	}{
		{"genvelope_limiter_delay_used_ratio/oel", 5 / law},
		{"genvelope_limiter_time_to_action_seconds/oel", law - 5},
		{"genvelope_limiter_current_ratio/oel", 1.38},
		{"genvelope_limiter_delay_used_ratio/scl", 0},
		{"genvelope_vhz_limiter_margin_ratio", 1 - 1/1.04},
	} {
		if v, ok := got[c.key]; !ok || math.Abs(v-c.want) > 1e-9 {
			t.Errorf("%s = %v (present %v), want %v", c.key, v, ok, c.want)
		}
	}
	if _, ok := got["genvelope_limiter_time_to_action_seconds/scl"]; ok {
		t.Error("the SCL is not timing; no time to action")
	}
}
