package metrics

import (
	"bytes"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/prometheus/client_golang/prometheus/testutil/promlint"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/ingest"
)

func store(t *testing.T) *ingest.Store { return storeNamed(t, "") }

// storeNamed is store with harrowmere-1's name and site set to name
// (unless it is "").
func storeNamed(t *testing.T, name string) *ingest.Store {
	t.Helper()
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	if name != "" {
		fl.Unit("harrowmere-1").Name, fl.Unit("harrowmere-1").Site = name, name
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
		"genvelope_samples_total", "genvelope_unit_info", "genvelope_thermal_capacity_used_ratio",
		"genvelope_rotor_mode_frequency_hertz", "genvelope_rotor_mode_damping_ratio"} {
		if have[name] == 0 {
			t.Errorf("no series for %s", name)
		}
	}
	// The rotor mode of harrowmere-1 (avr basis) lies in the electromechanical
	// range the spec names, 0.1 to 3 Hz (envelope.md; common practice).
	for _, mf := range mfs {
		if mf.GetName() == "genvelope_rotor_mode_frequency_hertz" {
			if f := mf.GetMetric()[0].GetGauge().GetValue(); !(f >= 0.1 && f <= 3) {
				t.Errorf("rotor mode at %v Hz", f)
			}
		}
	}
	// Units without a sample export their info and thermal state only.
	if have["genvelope_unit_info"] != 3 || have["genvelope_reactive_headroom_vars"] != 2 {
		t.Errorf("series: %v", have)
	}
}

// The text writer says exactly what the registry says, and passes the
// Prometheus linter (Prometheus documentation; the tool is the check).
func TestWriteTextMatchesRegistry(t *testing.T) {
	for _, name := range []string{"", "Unit \"one\" \\ of\nthe site"} { // label values to escape
		t.Run(name, func(t *testing.T) { writeTextMatchesRegistry(t, storeNamed(t, name)) })
	}
}

func writeTextMatchesRegistry(t *testing.T, s *ingest.Store) {
	now := func() time.Time { return time.Date(2026, 6, 1, 12, 0, 5, 0, time.UTC) }
	c := NewCollector(s, now)
	reg := prometheus.NewPedanticRegistry()
	reg.MustRegister(c)
	want, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	if err := c.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	p := expfmt.NewTextParser(model.LegacyValidation)
	got, err := p.TextToMetricFamilies(bytes.NewReader(buf.Bytes()))
	if err != nil {
		t.Fatalf("the text does not parse: %v\n%s", err, buf.String())
	}
	if len(got) != len(want) {
		t.Fatalf("%d families written, registry has %d", len(got), len(want))
	}
	for _, w := range want {
		g := got[w.GetName()]
		if g == nil {
			t.Errorf("family %s missing", w.GetName())
			continue
		}
		if g.GetHelp() != w.GetHelp() || g.GetType() != w.GetType() || len(g.GetMetric()) != len(w.GetMetric()) {
			t.Errorf("family %s differs: %d series written, registry %d", w.GetName(), len(g.GetMetric()), len(w.GetMetric()))
		}
		values := map[string]float64{}
		for _, m := range g.GetMetric() {
			values[labelKey(m)] = value(m)
		}
		for _, m := range w.GetMetric() {
			if v, ok := values[labelKey(m)]; !ok || v != value(m) {
				t.Errorf("%s{%s}: written %v (present %v), registry %v", w.GetName(), labelKey(m), v, ok, value(m))
			}
		}
	}
	var fams []*dto.MetricFamily
	for _, f := range got {
		fams = append(fams, f)
	}
	problems, err := promlint.NewWithMetricFamilies(fams).Lint()
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("lint: %s: %s", p.Metric, p.Text)
	}
}

func labelKey(m *dto.Metric) string {
	var parts []string
	for _, l := range m.GetLabel() {
		parts = append(parts, l.GetName()+"="+l.GetValue())
	}
	sort.Strings(parts)
	return strings.Join(parts, ",")
}

func value(m *dto.Metric) float64 {
	if m.Gauge != nil {
		return m.GetGauge().GetValue()
	}
	return m.GetCounter().GetValue()
}

// A caller's scope and the parts of /metrics combine: each shard serves
// only the units both admit, the shards together every unit in scope,
// and the unit count of ?units=none is of the units in scope.
func TestFilterScopeAndShards(t *testing.T) {
	c := NewCollector(store(t), nil)
	scope := func(id string) bool { return id != "brindle-gt3" }
	count := func(f Filter, family string) int {
		var b bytes.Buffer
		if err := c.WriteTextFiltered(&b, f); err != nil {
			t.Fatal(err)
		}
		return strings.Count(b.String(), "\n"+family)
	}
	units := 0
	for shard := range uint32(2) {
		units += count(Filter{Keep: scope, NoFleet: true, Shard: shard, Shards: 2}, "genvelope_unit_info{")
	}
	if units != 2 {
		t.Errorf("the two shards serve %d units in scope, want 2", units)
	}
	var b bytes.Buffer
	if err := c.WriteTextFiltered(&b, Filter{Keep: scope, NoUnits: true}); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "\ngenvelope_fleet_units 2\n") || strings.Contains(b.String(), "unit=") {
		t.Errorf("?units=none in scope:\n%s", b.String())
	}
}
