package ingest

import (
	"math"
	"testing"
	"time"
)

// The trend keeps one point per step of sample time: a step's headroom
// is its first sample's, its margin the smallest of its samples; a step
// without samples is unknown; the ring keeps six hours.
func TestTrend(t *testing.T) {
	const id = "harrowmere-1"
	at := func(min, s int) time.Time {
		return t0.Add(time.Duration(min)*time.Minute + time.Duration(s)*time.Second)
	}
	for _, tc := range []struct {
		name   string
		smps   []Sample
		points int
		check  func(t *testing.T, s *Store, tr []TrendPoint)
	}{
		{"empty", nil, 0, nil},
		{"one step: its first sample", []Sample{
			{UnitID: id, Time: at(0, 0), PMW: 200, QMvar: 50, VKV: 20},
			{UnitID: id, Time: at(0, 20), PMW: 200, QMvar: 200, VKV: 20}, // nearer the field limit
			{UnitID: id, Time: at(0, 40), PMW: 200, QMvar: 60, VKV: 20},
		}, 1, func(t *testing.T, s *Store, tr []TrendPoint) {
			// Headroom of the first sample: q_max − q with q = 50 Mvar.
			first := NewStore(exampleFleet(t), Options{})
			first.Accept(t0.Add(time.Hour), &Sample{UnitID: id, Time: at(0, 0), PMW: 200, QMvar: 50, VKV: 20})
			fv := first.Unit(id).View()
			up, down := fv.Eval.Headroom(fv.Point.Q)
			if want := fv.Eval.Margins[fv.Eval.Binding].V; math.Abs(tr[0].Margin-want) > 1e-4 {
				t.Errorf("margin %g, want the first sample's %g", tr[0].Margin, want)
			}
			if math.Abs(tr[0].UpPU-up.V) > 1e-3 || math.Abs(tr[0].DownPU-down.V) > 1e-3 {
				t.Errorf("headroom %g/%g pu, want the first sample's %g/%g", tr[0].UpPU, tr[0].DownPU, up.V, down.V)
			}
			if !tr[0].Time.Equal(t0) {
				t.Errorf("step starts %v, want %v", tr[0].Time, t0)
			}
		}},
		{"a gap is unknown", []Sample{
			{UnitID: id, Time: at(0, 0), PMW: 200, QMvar: 50, VKV: 20},
			{UnitID: id, Time: at(3, 5), PMW: 200, QMvar: 50, VKV: 20},
		}, 4, func(t *testing.T, s *Store, tr []TrendPoint) {
			for i, p := range tr {
				unknown := math.IsNaN(p.UpPU) && math.IsNaN(p.DownPU) && math.IsNaN(p.Margin)
				if (i == 1 || i == 2) != unknown {
					t.Errorf("point %d: %+v, unknown %v", i, p, unknown)
				}
				if want := t0.Add(time.Duration(i) * TrendStep); !p.Time.Equal(want) {
					t.Errorf("point %d at %v, want %v", i, p.Time, want)
				}
			}
		}},
		{"six hours kept", func() []Sample {
			var out []Sample
			for m := range 7 * 60 {
				out = append(out, Sample{UnitID: id, Time: at(m, 0), PMW: 200, QMvar: 50, VKV: 20})
			}
			return out
		}(), TrendPoints, func(t *testing.T, s *Store, tr []TrendPoint) {
			if want := at(7*60-TrendPoints, 0); !tr[0].Time.Equal(want) {
				t.Errorf("oldest point %v, want %v", tr[0].Time, want)
			}
			for i, p := range tr {
				if math.IsNaN(p.Margin) || math.IsNaN(p.UpPU) {
					t.Fatalf("point %d unknown: %+v", i, p)
				}
			}
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := NewStore(exampleFleet(t), Options{})
			now := t0.Add(24 * time.Hour)
			for i := range tc.smps {
				if r, d := s.Accept(now, &tc.smps[i]); r != Accepted {
					t.Fatalf("sample %d: %v %s", i, r, d)
				}
			}
			tr := s.Unit(id).Trend(nil)
			if len(tr) != tc.points {
				t.Fatalf("%d points, want %d", len(tr), tc.points)
			}
			if tc.check != nil {
				tc.check(t, s, tr)
			}
		})
	}
}

// Writing the trend does not allocate: it is on the per-sample path.
func TestTrendDoesNotAllocate(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	now := t0.Add(24 * time.Hour)
	i := 0
	allocs := testing.AllocsPerRun(500, func() {
		i++
		smp := Sample{UnitID: "harrowmere-1", Time: t0.Add(time.Duration(i) * 7 * time.Second), PMW: 200, QMvar: 50, VKV: 20}
		if r, d := s.Accept(now, &smp); r != Accepted {
			t.Fatalf("%v %s", r, d)
		}
	})
	if allocs != 0 {
		t.Errorf("%v allocations per sample, want 0", allocs)
	}
}
