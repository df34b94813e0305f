package ingest

import (
	"encoding/json"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
)

// TestOELTimerOnSampleTime: harrowmere-1's OEL (example fleet: pickup
// 1.05, k_s 15, ceiling 1.6) held at 1.38 pu field current times out
// after the inverse-time law's t = 15 / ((1.38/1.05)^2 - 1) = 20.6 s of
// sample time (coordination.md), whatever the sample spacing; the state
// survives a snapshot written as JSON and restored into a new store (what
// the state file does across kill -9), and the timer goes on from there.
func TestOELTimerOnSampleTime(t *testing.T) {
	fl := exampleFleet(t)
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	law := 15 / ((1.38/1.05)*(1.38/1.05) - 1)
	now := t0.Add(time.Hour)
	sample := func(at time.Duration) Sample {
		smp := good("harrowmere-1", t0.Add(at))
		smp.FieldA, smp.HasFieldA = 1.38*ratedA, true
		smp.Coolant, smp.HasCoolant = 414, true
		return smp
	}
	s := NewStore(fl, Options{})
	// A first sample is suspect (it holds nothing until confirmed), so
	// the overload starts at -1 s and is counted from 0; then uneven
	// spacing: 0.5 s, 1 s and 2 s steps up to 8 s.
	at := -time.Second
	for _, step := range []time.Duration{0, 1000, 500, 500, 1000, 2000, 1000, 500, 500, 2000} {
		at += step * time.Millisecond
		smp := sample(at)
		if r, d := s.Accept(now, &smp); r != Accepted {
			t.Fatalf("%v %s", r, d)
		}
	}
	check := func(s *Store, elapsed float64) {
		t.Helper()
		v := s.Unit("harrowmere-1").View().Limiters.OEL
		if !v.Configured || !v.Timing || math.Abs(v.X-1.38) > 1e-9 {
			t.Fatalf("OEL view %+v, want timing at 1.38 pu", v)
		}
		if math.Abs(v.Used-elapsed/law) > 1e-9 || math.Abs(v.ToActionS-(law-elapsed)) > 1e-9 {
			t.Errorf("after %v s: used %v, time to action %v s; want %v and %v s", elapsed, v.Used, v.ToActionS, elapsed/law, law-elapsed)
		}
	}
	check(s, 8)

	data, err := json.Marshal(s.Snapshot(now))
	if err != nil {
		t.Fatal(err)
	}
	var sn Snapshot
	if err := json.Unmarshal(data, &sn); err != nil {
		t.Fatal(err)
	}
	s2 := NewStore(exampleFleet(t), Options{})
	if n, _, _ := s2.Restore(&sn); n != 3 {
		t.Fatalf("restored %d units", n)
	}
	check(s2, 8)
	for at = 9 * time.Second; at <= 20*time.Second; at += time.Second {
		smp := sample(at)
		s2.Accept(now, &smp)
	}
	check(s2, 20)
	smp := sample(21 * time.Second)
	s2.Accept(now, &smp)
	if v := s2.Unit("harrowmere-1").View().Limiters.OEL; v.Used != 1 || v.ToActionS != 0 {
		t.Errorf("at 21 s (law %.2f s) used %v, time to action %v; want the OEL acting", law, v.Used, v.ToActionS)
	}
	// Below the pickup the timer resets.
	smp = sample(22 * time.Second)
	smp.FieldA = 0.9 * ratedA
	s2.Accept(now, &smp)
	smp = sample(23 * time.Second)
	smp.FieldA = 0.9 * ratedA
	s2.Accept(now, &smp)
	if v := s2.Unit("harrowmere-1").View().Limiters.OEL; v.Used != 0 || v.Timing {
		t.Errorf("below the pickup: %+v, want reset", v)
	}
	// The V/Hz limiter margin, 1 - (v/f)/setpoint, at 20 kV and rated frequency.
	if m := s2.Unit("harrowmere-1").View().Limiters.VHzMargin; !m.OK || math.Abs(m.V-(1-1/1.04)) > 1e-12 {
		t.Errorf("V/Hz limiter margin %v, want %v", m, 1-1/1.04)
	}
}

// TestOELAlarmSentence: held at 1.38 pu field current, harrowmere-1's OEL
// alarm warns at once (20.6 s to action, under the 30 s default) with
// the sentence an operator reads, and goes critical when 10 s are left:
// at 10.6 s of sample time, from t = 15 / ((1.38/1.05)^2 - 1).
func TestOELAlarmSentence(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	w := s.Hub().Watch(64, func(e *alarm.Event) bool { return e.Kind == alarm.OELTimer })
	defer w.Close()
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	now := t0.Add(time.Hour)
	var evs []alarm.Event
	for i := -1; i <= 12; i++ { // the sample at -1 s confirms the overload (a first sample is suspect)
		smp := good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))
		smp.FieldA, smp.HasFieldA = 1.38*ratedA, true
		smp.Coolant, smp.HasCoolant = 414, true
		s.Accept(now, &smp)
		for len(w.C) > 0 {
			evs = append(evs, <-w.C)
		}
	}
	if len(evs) != 2 {
		t.Fatalf("events %+v, want warning then critical", evs)
	}
	law := 15 / ((1.38/1.05)*(1.38/1.05) - 1)
	if e := evs[0]; e.Level != alarm.Warning || !e.Time.Equal(t0) || e.Units != "s" || math.Abs(e.Actual-law) > 1e-9 {
		t.Errorf("first event %+v, want a warning at once with %.2f s to action", e, law)
	}
	if want := "harrowmere-1: OEL will act in 21 s at 1.38 pu field current at 200.0 MW, 20.00 kV"; !strings.HasPrefix(evs[0].Message, want) {
		t.Errorf("sentence %q, want it to start %q", evs[0].Message, want)
	}
	if e := evs[1]; e.Level != alarm.Critical || !e.Time.Equal(t0.Add(11*time.Second)) {
		t.Errorf("second event %+v, want critical at 11 s (10 s left at 10.6 s)", e)
	}
}

// TestAcceptWithLimitersDoesNotAllocate: the limiter timers add nothing
// to the per-sample path's allocations (the curves are taken once per
// configuration).
func TestAcceptWithLimitersDoesNotAllocate(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	now := t0.Add(time.Hour)
	i := 0
	smp := good("harrowmere-1", t0)
	smp.FieldA, smp.HasFieldA = 1.2*ratedA, true
	smp.Coolant, smp.HasCoolant = 414, true
	s.Accept(now, &smp)
	allocs := testing.AllocsPerRun(200, func() {
		i++
		smp.Time = t0.Add(time.Duration(i) * 100 * time.Millisecond)
		s.Accept(now, &smp)
	})
	if allocs != 0 {
		t.Errorf("Accept with the OEL timing: %v allocations per sample, want 0", allocs)
	}
	if v := s.Unit("harrowmere-1").View().Limiters.OEL; !v.Timing || v.Used <= 0 {
		t.Errorf("the OEL is not timing: %+v", v)
	}
}
