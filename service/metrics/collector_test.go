package metrics

import (
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/ingest"
)

func store(t *testing.T) *ingest.Store {
	t.Helper()
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	s := ingest.NewStore(fl, ingest.Options{})
	at := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	smp := ingest.Sample{UnitID: "harrowmere-1", Time: at, PMW: 300, QMvar: 120, VKV: 20.4,
		FieldA: 2500, HasFieldA: true, Coolant: 414, HasCoolant: true}
	if r, d := s.Accept(at, &smp); r != ingest.Accepted {
		t.Fatalf("%v %s", r, d)
	}
	return s
}

// The Prometheus conventions (base units, _total counters, _ratio for
// ratios), checked by client_golang's own linter (Prometheus
// documentation; the tool itself is the check).
func TestCollectorLint(t *testing.T) {
	c := NewCollector(store(t), nil)
	problems, err := testutil.CollectAndLint(c)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("lint: %s: %s", p.Metric, p.Text)
	}
}

func TestCollectorSeries(t *testing.T) {
	s := store(t)
	c := NewCollector(s, func() time.Time { return time.Date(2026, 6, 1, 12, 0, 5, 0, time.UTC) })
	reg := prometheus.NewPedanticRegistry()
	reg.MustRegister(c)
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	have := map[string]int{}
	for _, mf := range mfs {
		have[mf.GetName()] = len(mf.GetMetric())
	}
	for _, name := range []string{"genvelope_reactive_headroom_vars", "genvelope_limit_margin_ratio",
		"genvelope_samples_total", "genvelope_unit_info", "genvelope_thermal_capacity_used_ratio"} {
		if have[name] == 0 {
			t.Errorf("no series for %s", name)
		}
	}
	// Units without a sample export their info and thermal state only.
	if have["genvelope_unit_info"] != 3 || have["genvelope_reactive_headroom_vars"] != 2 {
		t.Errorf("series: %v", have)
	}
}
