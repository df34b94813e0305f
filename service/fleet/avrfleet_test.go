package fleet

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"reflect"
	"runtime"
	"strings"
	"sync/atomic"
	"testing"
	"time"
)

// A generated fleet of avr units for timing the load (BenchmarkLoadAVRFleet)
// and for `genvelope validate` (TestWriteAVRFleet): invented units of four
// invented designs (plausible values, not check values).

// avrDesign is one design of the generated fleet, in flow-style YAML with
// the id, name, site, x_external_pu, k_a and zeta_min left as
// %[1]s ... %[6]s.
type avrDesign struct {
	yaml string
	xe   float64 // typical grid.x_external_pu
	ka   float64 // typical excitation.k_a
}

var avrDesigns = [...]avrDesign{
	{ // steam turbine set, static exciter and stabilizer
		yaml: `  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 390, kv: 20, power_factor: 0.85, frequency_hz: 50, poles: 2}
    machine: {rotor: round, xd: 2.05, xl: 0.17, xp: 0.19, ra: 0.0018, xd_transient: 0.27, inertia_h_s: 4.8, td0_transient_s: 8.2, saturation: {s10: 0.11, s12: 0.38}}
    field: {air_gap_a: 1050, rated_a: 3150}
    prime_mover: {p_max_mw: 335, p_min_mw: 120}
    grid: {x_external_pu: %[4]s}
    excitation: {k_a: %[5]s, t_a_s: 0.02, t_r_s: 0.02, efd_min_pu: -4.5, efd_max_pu: 5.6}
    stabilizer: {k: 10, t_w_s: 3, t1_s: 0.15, t2_s: 0.03, t3_s: 0.08, t4_s: 0.03}
    stability: {zeta_min: %[6]s}
`, xe: 0.18, ka: 200},
	{ // hydro set, salient poles, static exciter and stabilizer
		yaml: `  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 120, kv: 13.8, power_factor: 0.9, frequency_hz: 50, poles: 36}
    machine: {rotor: salient, xd: 1.05, xq: 0.66, xl: 0.15, xp: 0.21, ra: 0.003, xd_transient: 0.30, inertia_h_s: 3.2, td0_transient_s: 6.1, saturation: {s10: 0.09, s12: 0.30}}
    field: {air_gap_a: 680, rated_a: 1320}
    prime_mover: {p_max_mw: 110, p_min_mw: 20}
    grid: {x_external_pu: %[4]s}
    excitation: {k_a: %[5]s, t_a_s: 0.02, t_r_s: 0.02, efd_min_pu: -3.6, efd_max_pu: 4.5}
    stabilizer: {k: 8, t_w_s: 5, t1_s: 0.2, t2_s: 0.04, t3_s: 0.1, t4_s: 0.04}
    stability: {zeta_min: %[6]s}
`, xe: 0.15, ka: 150},
	{ // gas turbine set, brushless exciter, no stabilizer
		yaml: `  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 160, kv: 15, power_factor: 0.85, frequency_hz: 50, poles: 2}
    machine: {rotor: round, xd: 2.2, xl: 0.14, ra: 0.0025, xd_transient: 0.24, inertia_h_s: 6.5, td0_transient_s: 7.4, saturation: {s10: 0.10, s12: 0.42}}
    field: {air_gap_a: 520, rated_a: 1610}
    prime_mover: {p_max_mw: 136, p_min_mw: 40}
    grid: {x_external_pu: %[4]s}
    excitation: {k_a: %[5]s, t_a_s: 0.15, t_r_s: 0.02, efd_min_pu: 0, efd_max_pu: 4.5}
    stability: {zeta_min: %[6]s}
`, xe: 0.20, ka: 50},
	{ // small hydro set, 60 Hz, rotating exciter and stabilizer
		yaml: `  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 45, kv: 11, power_factor: 0.9, frequency_hz: 60, poles: 24}
    machine: {rotor: salient, xd: 1.15, xq: 0.7, xl: 0.16, xp: 0.22, ra: 0.004, xd_transient: 0.32, inertia_h_s: 2.6, td0_transient_s: 5.2, saturation: {s10: 0.1, s12: 0.33}}
    field: {air_gap_a: 410, rated_a: 870}
    prime_mover: {p_max_mw: 40, p_min_mw: 5}
    grid: {x_external_pu: %[4]s}
    excitation: {k_a: %[5]s, t_a_s: 0.05, t_r_s: 0.01, efd_min_pu: -2, efd_max_pu: 4}
    stabilizer: {k: 6, t_w_s: 4, t1_s: 0.18, t2_s: 0.04, t3_s: 0.1, t4_s: 0.04}
    stability: {zeta_min: %[6]s}
`, xe: 0.25, ka: 80},
}

// avrSisterGrids is how many grid connections (x_external_pu values) each
// design has in the fleet of sister units: len(avrDesigns) times as many
// distinct tables.
const avrSisterGrids = 5

// avrFleetYAML returns a fleet file of n avr units cycling over the
// designs. With distinct, every unit has its own x_external_pu and k_a
// (within a few per cent of the design's), so no two units share a
// table; otherwise the units of a design differ only in one of
// avrSisterGrids grid reactances. zetaMin is every unit's
// stability.zeta_min.
func avrFleetYAML(n int, distinct bool, zetaMin float64) []byte {
	var b bytes.Buffer
	b.Grow(n * 900)
	fmt.Fprintf(&b, "# Generated fleet of %d avr units (distinct parameters: %v); invented data.\nunits:\n", n, distinct)
	for i := range n {
		d := avrDesigns[i%len(avrDesigns)]
		j := i / len(avrDesigns)
		xe := d.xe * (0.9 + 0.05*float64(j%avrSisterGrids))
		ka := d.ka
		if distinct {
			// Unique per unit: j/n steps of about 1e-5 pu in xe, and k_a
			// within 5 % on a second, coprime cycle.
			xe = d.xe * (0.9 + 0.2*float64(j)/float64(n))
			ka = d.ka * (0.95 + 0.1*float64(j%97)/97)
		}
		fmt.Fprintf(&b, d.yaml, fmt.Sprintf("gen-%05d", i+1), fmt.Sprintf("Generated unit %d", i+1),
			fmt.Sprintf("site-%03d", i/4+1), fmtNum(xe), fmtNum(ka), fmtNum(zetaMin))
	}
	return b.Bytes()
}

// BenchmarkLoadAVRFleet parses and builds a generated 10,000-unit avr
// fleet (-avrfleet.n to change) through the real loader, once per
// iteration: with sister units (20 distinct tables) and with all
// parameters distinct. It reports the wall time and the process's CPU
// time (user + system) per load and per unit; run it with -benchtime 1x
// and -cpu 2 for the 2-core figure.
func BenchmarkLoadAVRFleet(b *testing.B) {
	for _, tc := range []struct {
		name     string
		distinct bool
		zetaMin  float64
	}{{"sisters", false, 0}, {"distinct", true, 0}, {"sisters-zetamin", false, 0.05}, {"distinct-zetamin", true, 0.05}} {
		b.Run(tc.name, func(b *testing.B) {
			n := *avrFleetN
			if tc.zetaMin > 0 && tc.distinct {
				n = min(n, 1000) // about 0.1 s a unit: the figure per unit is the point
			}
			data := avrFleetYAML(n, tc.distinct, tc.zetaMin)
			var wall time.Duration
			var cpu float64
			for b.Loop() {
				runtime.GC()
				c0, t0 := cpuSeconds(), time.Now()
				f, ds, err := ParseContext(context.Background(), "avr.yaml", data)
				wall += time.Since(t0)
				cpu += cpuSeconds() - c0
				if err != nil || ds.HasErrors() || len(f.Units) != n {
					b.Fatalf("%v %v (%d units)", err, ds, len(f.Units))
				}
			}
			runs := float64(b.N)
			b.ReportMetric(wall.Seconds()/runs, "wall-s/load")
			b.ReportMetric(cpu/runs, "cpu-s/load")
			b.ReportMetric(1e3*cpu/runs/float64(n), "cpu-ms/unit")
			b.ReportMetric(float64(n), "units")
		})
	}
}

var (
	avrFleetN   = flag.Int("avrfleet.n", 10000, "units of the generated avr fleet (BenchmarkLoadAVRFleet, TestWriteAVRFleet)")
	avrFleetDir = flag.String("avrfleet.dir", "", "TestWriteAVRFleet writes the generated avr fleets into this directory")
)

// TestWriteAVRFleet writes the generated fleets (sisters and distinct)
// into -avrfleet.dir for `genvelope validate --fleet`; without the flag
// it checks that a small one loads without findings.
func TestWriteAVRFleet(t *testing.T) {
	if *avrFleetDir == "" {
		f, ds, err := ParseContext(context.Background(), "avr.yaml", avrFleetYAML(12, true, 0))
		if err != nil || len(ds) != 0 || len(f.Units) != 12 {
			t.Fatalf("%v\n%v(%d units)", err, ds, len(f.Units))
		}
		return
	}
	for _, distinct := range []bool{false, true} {
		name := fmt.Sprintf("avr-fleet-%d-sisters.yaml", *avrFleetN)
		if distinct {
			name = fmt.Sprintf("avr-fleet-%d-distinct.yaml", *avrFleetN)
		}
		path := filepath.Join(*avrFleetDir, name)
		if err := os.WriteFile(path, avrFleetYAML(*avrFleetN, distinct, 0), 0o644); err != nil {
			t.Fatal(err)
		}
		t.Logf("wrote %s", path)
	}
}

// The units are decoded and their models built concurrently, but the
// fleet and its findings (errors of the decoder, a duplicate id, errors
// of limits.New and warnings of the rated-point checks, on several units)
// are those of one goroutine, whatever the number of workers.
func TestBuildConcurrentIsSequential(t *testing.T) {
	data := string(avrFleetYAML(40, false, 0))
	data = strings.ReplaceAll(data, "rated_a: 870", "rated_a: 830")               // a warning on every 4th unit
	data = strings.Replace(data, "xd_transient: 0.27", "xd_transient: 2.5", 3)    // errors of limits.New
	data = strings.Replace(data, "td0_transient_s: 6.1", "td0_transient_s: 0", 2) // errors of the avr basis
	data = strings.Replace(data, "id: gen-00021", "id: gen-00002", 1)             // a duplicate id
	data = strings.Replace(data, "poles: 36", "poles: x", 2)                      // errors of the decoder
	one, ds1, err := parse(context.Background(), "mixed.yaml", []byte(data), 1)
	if err != nil {
		t.Fatal(err)
	}
	if ds1.Count(Error) != 8 || ds1.Count(Warning) != 10 {
		t.Fatalf("want 8 errors and 10 warnings, got\n%s", ds1)
	}
	for _, workers := range []int{2, 3, 8} {
		f, ds, err := parse(context.Background(), "mixed.yaml", []byte(data), workers)
		if err != nil {
			t.Fatal(err)
		}
		if !reflect.DeepEqual(ds, ds1) {
			t.Errorf("%d workers: findings\n%s\nwant\n%s", workers, ds, ds1)
		}
		if len(f.Units) != len(one.Units) {
			t.Fatalf("%d workers: %d units, on one worker %d", workers, len(f.Units), len(one.Units))
		}
		for i, u := range f.Units {
			if (u.Model == nil) != (one.Units[i].Model == nil) {
				t.Errorf("%d workers: unit %s has a model %v, on one worker %v", workers, u.ID, u.Model != nil, one.Units[i].Model != nil)
			}
		}
	}
}

// stopAfter is a context whose Err is Canceled from its n-th call on.
type stopAfter struct {
	context.Context
	n atomic.Int64
}

func (c *stopAfter) Err() error {
	if c.n.Add(-1) < 0 {
		return context.Canceled
	}
	return nil
}

// A load stopped by its context returns the context's error and no
// fleet, whether it stops before the build or in the middle of it.
func TestParseContextStops(t *testing.T) {
	data := avrFleetYAML(16, true, 0)
	done, cancel := context.WithCancel(context.Background())
	cancel()
	mid := &stopAfter{Context: context.Background()}
	mid.n.Store(5)
	for name, ctx := range map[string]context.Context{"before": done, "midway": mid} {
		f, ds, err := ParseContext(ctx, "avr.yaml", data)
		if !errors.Is(err, context.Canceled) || f != nil || ds != nil {
			t.Errorf("%s: got %v, %d findings, fleet %v; want context.Canceled and nothing", name, err, len(ds), f != nil)
		}
	}
}
