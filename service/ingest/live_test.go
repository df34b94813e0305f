package ingest

import (
	"math"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/journal"
)

// A sample stamped in the year 1000 (a typo in a CSV year) is rejected
// before any arithmetic with its time, with the time in the detail; the
// real feed beside it and after it is accepted.
func TestYearThousandRejected(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	now := t0
	if r, d := s.Accept(now, ptr(good("harrowmere-1", now.Add(-time.Second)))); r != Accepted {
		t.Fatalf("real sample before: %v %s", r, d)
	}
	bad := good("harrowmere-1", time.Date(1000, 6, 1, 12, 0, 0, 0, time.UTC))
	r, d := s.Accept(now, &bad)
	if r != RejectOutOfRangeTime || !strings.Contains(d, "1000-06-01T12:00:00Z") {
		t.Fatalf("year 1000: %v %q, want out_of_range_time naming the time", r, d)
	}
	if strings.Contains(d, "2562047h") { // a saturated time.Duration
		t.Errorf("detail shows a saturated duration: %s", d)
	}
	for i := range 40 { // forty of them, interleaved with the real feed
		now = now.Add(time.Second)
		if r, _ := s.Accept(now, &bad); r != RejectOutOfRangeTime {
			t.Fatalf("bad sample %d: %v", i, r)
		}
		if r, d := s.Accept(now, ptr(good("harrowmere-1", now))); r != Accepted {
			t.Fatalf("real sample %d after the bad one: %v %s", i, r, d)
		}
	}
	// Before the horizon (default 7 days), and after 2262.
	for _, at := range []time.Time{now.Add(-8 * 24 * time.Hour), time.Date(2300, 1, 1, 0, 0, 0, 0, time.UTC)} {
		r, d := s.Accept(now, ptr(good("harrowmere-1", at)))
		if r != RejectOutOfRangeTime && r != RejectFuture {
			t.Errorf("%v: %v %s", at, r, d)
		}
	}
}

// A sample stamped ahead of the server clock (within the skew) is
// accepted, but the correctly-timed feed after it is not locked out.
func TestFutureSampleDoesNotLockOut(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{MaxFuture: 5 * time.Second})
	now := t0
	if r, d := s.Accept(now, ptr(good("harrowmere-1", now.Add(4*time.Second)))); r != Accepted {
		t.Fatalf("sample 4 s ahead: %v %s", r, d)
	}
	if r, _ := s.Accept(now, ptr(good("harrowmere-1", now.Add(6*time.Second)))); r != RejectFuture {
		t.Errorf("sample 6 s ahead: %v, want future", r)
	}
	for i := 1; i <= 10; i++ {
		now = now.Add(time.Second)
		if r, d := s.Accept(now, ptr(good("harrowmere-1", now))); r != Accepted {
			t.Fatalf("real sample %d s later: %v %s", i, r, d)
		}
	}
	// Samples late by more than the clock moved on are still out of order.
	if r, _ := s.Accept(now, ptr(good("harrowmere-1", now.Add(-1500*time.Millisecond)))); r != RejectOutOfOrder {
		t.Errorf("late sample: %v, want out of order", r)
	}
}

// Each plausibility rule, with a good sample beside it and the hint that
// names the mix-up. harrowmere-1: 390 MVA, 20 kV, IFag 1050 A.
func TestPlausibility(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	now := t0.Add(time.Hour)
	at := t0
	for _, tc := range []struct {
		name string
		set  func(*Sample)
		hint string
	}{
		{"voltage in pu", func(x *Sample) { x.VKV = 1.02 }, "per unit: send kV"},
		{"voltage in volts", func(x *Sample) { x.VKV = 20100 }, "volts: send kV"},
		{"power in kW", func(x *Sample) { x.PMW = 250000 }, "kW: send MW"},
		{"reactive power in kvar", func(x *Sample) { x.QMvar = 80000 }, "kvar: send Mvar"},
		{"field current in mA", func(x *Sample) { x.FieldA, x.HasFieldA = 2.1e6, true }, "mA: send A"},
		{"armature current", func(x *Sample) { x.PMW, x.QMvar, x.VKV = 500, 450, 10.5 }, "check that P, Q and V"},
	} {
		at = at.Add(time.Second)
		smp := good("harrowmere-1", at)
		tc.set(&smp)
		r, d := s.Accept(now, &smp)
		if r != RejectImplausible || !strings.Contains(d, tc.hint) {
			t.Errorf("%s: %v %q, want implausible with %q", tc.name, r, d, tc.hint)
		}
		at = at.Add(time.Second)
		if r, d := s.Accept(now, ptr(good("harrowmere-1", at))); r != Accepted {
			t.Errorf("%s: the good sample beside: %v %s", tc.name, r, d)
		}
	}
}

// One sample adds at most (MaxThermalX² − 1) × MaxHold of heating, and
// only once confirmed: a single spike of current is not integrated.
func TestThermalStepCap(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	now := t0.Add(time.Hour)
	field := func(at time.Time, xRated float64) *Sample {
		smp := good("harrowmere-1", at)
		smp.FieldA, smp.HasFieldA, smp.Coolant, smp.HasCoolant = xRated*ratedA, true, 414, true
		return &smp
	}
	for i := range 5 { // steady at 0.9 rated
		s.Accept(now, field(t0.Add(time.Duration(i)*time.Second), 0.9))
	}
	// A spike to 2.5 rated (a jump of 1.6 pu), then back.
	s.Accept(now, field(t0.Add(5*time.Second), 2.5))
	if v := s.Unit("harrowmere-1").View(); !v.Suspect {
		t.Error("the jump is not flagged suspect")
	}
	s.Accept(now, field(t0.Add(6*time.Second), 0.9))
	if h := s.Unit("harrowmere-1").View().Field.H; h != 0 {
		t.Errorf("one spike heated the field by %.2f s", h)
	}
	// A confirmed 2.5 rated after a gap of a minute: the gap counts as
	// MaxHold (10 s) and the current as at most MaxThermalX.
	s.Accept(now, field(t0.Add(7*time.Second), 2.5))
	s.Accept(now, field(t0.Add(8*time.Second), 2.5))
	h0 := s.Unit("harrowmere-1").View().Field.H
	s.Accept(now, field(t0.Add(68*time.Second), 2.5))
	dh := s.Unit("harrowmere-1").View().Field.H - h0
	capS := (MaxThermalX*MaxThermalX - 1) * 10
	// (x² − 1)·dt with x = 2.5 held over the capped 10 s (C50.13 law).
	if want := (2.5*2.5 - 1) * 10; math.Abs(dh-want) > 1e-6 || dh > capS {
		t.Errorf("one step after a 60 s gap heated %.3f s; want %.3f (cap %.1f)", dh, want, capS)
	}
}

// A unit that stops reporting during a field overload: by the wall
// clock its accumulator keeps rising and its field thermal alarm rises
// without a new sample; at the stale threshold its thermal state turns
// unknown. One that stops below its rating cools.
func TestWallClockSupervision(t *testing.T) {
	fl := exampleFleet(t)
	wall := t0
	s := NewStore(fl, Options{Now: func() time.Time { return wall }})
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	w := s.Hub().Watch(64, func(e *alarm.Event) bool { return e.Kind == alarm.FieldThermal })
	defer w.Close()
	push := func(id string, at time.Time, x float64) {
		smp := good(id, at)
		if id == "larchwater-2" {
			smp = goodLW(at)
		}
		c := fl.Unit(id)
		smp.FieldA, smp.HasFieldA = x*c.Model.RatedFieldCurrent()*c.Field.AirGapA, true
		if c.Coolant != nil {
			smp.Coolant, smp.HasCoolant = c.Coolant.Points[len(c.Coolant.Points)-1].At, true
		}
		if r, d := s.Accept(wall, &smp); r != Accepted {
			t.Fatalf("%s: %v %s", id, r, d)
		}
	}
	_ = ratedA
	// 1.46 rated field for 3 s, then silence (sample time = wall time).
	for i := range 4 {
		wall = t0.Add(time.Duration(i) * time.Second)
		push("harrowmere-1", wall, 1.46)
	}
	// Heat it a little below rating on another unit.
	for i := range 4 {
		push("larchwater-2", t0.Add(time.Duration(i)*time.Second), 1.3)
	}
	hStop := s.Unit("harrowmere-1").View().Field.H
	var raised *alarm.Event
	for i := 1; i <= 40; i++ {
		wall = t0.Add(3*time.Second + time.Duration(i)*time.Second)
		s.Sweep(wall)
		select {
		case ev := <-w.C:
			if ev.Unit == "harrowmere-1" && ev.Level > alarm.Normal && raised == nil {
				raised = &ev
			}
		default:
		}
		if i == 10 {
			v := s.Unit("harrowmere-1").View()
			// C50.13 law, held current: (1.46² − 1) × 10 s more.
			if want := hStop + (1.46*1.46-1)*10; math.Abs(v.Field.H-want) > 0.05 {
				t.Errorf("after 10 s of silence H = %.3f s, want %.3f", v.Field.H, want)
			}
			if v.Data != DataFresh || v.ThermalUnknown {
				t.Errorf("at 10 s: %v, thermal unknown %v", v.Data, v.ThermalUnknown)
			}
		}
	}
	if raised == nil {
		t.Fatal("the field thermal alarm did not rise on the wall clock")
	}
	v := s.Unit("harrowmere-1").View()
	if v.Data != DataStale || !v.ThermalUnknown {
		t.Errorf("after 40 s: %v, thermal unknown %v; want stale and unknown", v.Data, v.ThermalUnknown)
	}
	if v.Alarms[alarm.FieldThermal].Level == alarm.Normal {
		t.Error("the field thermal alarm went back to normal while stale")
	}
	// Heating stops at the stale threshold (30 s): H is what 30 s gave.
	if want := hStop + (1.46*1.46-1)*30; math.Abs(v.Field.H-want) > 0.05 {
		t.Errorf("stale H = %.3f s, want %.3f (heating up to the stale threshold only)", v.Field.H, want)
	}
	// larchwater-2 was heated at 1.3 then... it was pushed with sample
	// times 0..3 s too, so it is also silent: push it below rating now.
	wall = wall.Add(time.Second)
	push("larchwater-2", wall, 1.3)
	wall = wall.Add(time.Second)
	push("larchwater-2", wall, 1.3)
	wall = wall.Add(time.Second)
	push("larchwater-2", wall, 0.8)
	wall = wall.Add(time.Second)
	push("larchwater-2", wall, 0.8)
	h0 := s.Unit("larchwater-2").View().Field.H
	if h0 <= 0 {
		t.Fatalf("larchwater-2 not heated: %v", h0)
	}
	wall = wall.Add(5 * time.Second)
	s.Sweep(wall)
	x := s.Unit("larchwater-2").View().XField
	if h := s.Unit("larchwater-2").View().Field.H; !(h < h0) || math.Abs(h-max(0, h0+(x*x-1)*5)) > 1e-6 {
		t.Errorf("below rating, 5 s of silence: H %.3f → %.3f, want it to cool by (1 − 0.8²) × 5", h0, h)
	}
}

// A unit that never reported is no data, and its stale alarm says so.
func TestNoData(t *testing.T) {
	wall := t0
	s := NewStore(exampleFleet(t), Options{Now: func() time.Time { return wall }})
	w := s.Hub().Watch(64, nil)
	defer w.Close()
	if v := s.Unit("harrowmere-1").View(); v.Data != NoData {
		t.Errorf("never reported: %v, want no data", v.Data)
	}
	wall = t0.Add(31 * time.Second)
	s.Sweep(wall)
	ev := <-w.C
	if ev.Kind != alarm.StaleTelemetry || !strings.Contains(ev.Message, "no data") {
		t.Errorf("event %+v, want a stale-telemetry alarm saying no data", ev)
	}
}

// While the field-current mismatch alarm is active (a frozen
// transducer), the reading is doubted: the field margin takes the larger
// of the reading and the model (envelope.md, "Margins"), here the model's.
func TestFrozenFieldSensorUsesModel(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	u := fl.Unit("harrowmere-1")
	now := t0.Add(time.Hour)
	var v View
	for i := range 120 {
		smp := good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))
		smp.QMvar = 50 + float64(i) // the unit moves; the reading does not
		smp.FieldA, smp.HasFieldA, smp.Coolant, smp.HasCoolant = 1500, true, 414, true
		s.Accept(now, &smp)
		v = s.Unit("harrowmere-1").View()
	}
	if v.Alarms[alarm.FieldCurrentMismatch].Level == alarm.Normal {
		t.Fatal("the mismatch alarm did not rise")
	}
	if !v.Point.IfdDoubtful {
		t.Error("the frozen reading is not doubted")
	}
	if model := v.Eval.IfdModel; !(v.Point.Ifd < model) {
		t.Fatalf("the frozen reading %v is not below the model's %v: the check below needs it", v.Point.Ifd, model)
	}
	// The margin an evaluation without the reading gives, cold.
	pt := v.Point
	pt.IfdMeasured = false
	want := u.Model.Evaluate(pt, nil).Margins[limits.LimitField]
	if got := v.Eval.Margins[limits.LimitField]; got != want {
		t.Errorf("field margin %v, model's %v", got, want)
	}
}

// A reload that removes a unit ends its alarms with events and keeps
// its thermal memory: added again, it comes back warm.
func TestReloadRemovesAndRestoresWarm(t *testing.T) {
	fl := exampleFleet(t)
	j, err := journal.Open(filepath.Join(t.TempDir(), "j"), journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer j.Close()
	s := NewStore(fl, Options{Journal: j})
	now := t0.Add(time.Hour)
	for i := range 20 {
		smp := good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))
		smp.VKV = 22 // 1.1 pu at rated frequency: past the volts-per-hertz limit
		s.Accept(now, &smp)
	}
	u := s.Unit("harrowmere-1")
	u.mu.Lock()
	u.armature.H = 12
	u.mu.Unlock()
	if len(s.ActiveOf("harrowmere-1")) == 0 {
		t.Fatal("no active alarm to end")
	}
	w := s.Hub().Watch(64, nil)
	defer w.Close()
	without := exampleFleet(t)
	var kept []*fleet.Unit
	for _, c := range without.Units {
		if c.ID != "harrowmere-1" {
			kept = append(kept, c)
		}
	}
	without.Units = kept
	s.Replace(without)
	select {
	case ev := <-w.C:
		if !ev.Removed || ev.Level != alarm.Normal || !strings.Contains(ev.Message, "removed") {
			t.Errorf("event %+v, want the alarm ended because the unit was removed", ev)
		}
	default:
		t.Fatal("no event for the removed unit's alarm")
	}
	s.Replace(exampleFleet(t))
	if h := s.Unit("harrowmere-1").View().Armature.H; h != 12 {
		t.Errorf("re-added unit's armature H = %v, want 12 (warm)", h)
	}
	// Journalled: the alarm's rise, its end by removal, both reloads.
	es, _, err := j.Query(journal.Filter{Changes: []string{journal.ChangeRemoved, journal.ChangeReload}}, 10, "")
	if err != nil || len(es) < 3 {
		t.Fatalf("journal %+v %v, want two reloads and the removals", es, err)
	}
	if !strings.Contains(es[0].Message, "Back with their state: harrowmere-1") || !strings.Contains(es[1].Message, "Removed: harrowmere-1") {
		t.Errorf("reload entries %+v", es[:2])
	}
	for _, e := range es[2:] {
		if e.Change != journal.ChangeRemoved || e.Unit != "harrowmere-1" || e.Level != "normal" || e.Prev == "normal" {
			t.Errorf("removal entry %+v", e)
		}
	}
}

// The state keeps each unit's whole duplicate window; a bad unit entry
// is dropped and said why, the rest restored.
func TestSnapshotWindowAndValidation(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	now := t0.Add(time.Hour)
	for i := range 300 {
		s.Accept(now, ptr(goodLW(t0.Add(time.Duration(i)*time.Second))))
		s.Accept(now, ptr(good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))))
	}
	sn := s.Snapshot(now)
	if n := len(sn.Units["larchwater-2"].Times); n != ringSize {
		t.Fatalf("%d times kept, want %d", n, ringSize)
	}
	bad := sn.Units["harrowmere-1"]
	bad.Latest.VKV = 0
	sn.Units["harrowmere-1"] = bad
	s2 := NewStore(exampleFleet(t), Options{})
	restored, _, errs := s2.Restore(sn)
	if len(errs) != 1 || !strings.Contains(errs[0].Error(), "harrowmere-1") || restored == 0 {
		t.Fatalf("restored %d, errors %v; want the one bad unit reported", restored, errs)
	}
	if r, _ := s2.Accept(now, ptr(goodLW(t0.Add(300*time.Second-ringSize*time.Second)))); r != Duplicate {
		t.Errorf("oldest of the window after restore: %v, want duplicate", r)
	}
	if s2.Unit("harrowmere-1").View().HasSample {
		t.Error("the bad entry was restored")
	}
}

// An alarm held by its off-delay keeps the sentence of what raised it,
// and a sentence past a limit says "beyond", never a negative "left".
func TestHeldAlarmKeepsSentence(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	w := s.Hub().Watch(64, nil)
	defer w.Close()
	now := t0.Add(time.Hour)
	i := 0
	push := func(vKV float64, n int) {
		for range n {
			smp := good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))
			smp.VKV = vKV
			s.Accept(now, &smp)
			i++
		}
	}
	push(22, 10) // 1.1 pu: past the volts-per-hertz limit
	var raised string
	for _, ev := range s.ActiveOf("harrowmere-1") {
		if ev.Kind == alarm.VoltsPerHertz {
			raised = ev.Message
		}
	}
	if !strings.Contains(raised, "1.100 pu") {
		t.Fatalf("raised with %q", raised)
	}
	push(20, 5) // back inside, within the 30 s off-delay
	for _, ev := range s.ActiveOf("harrowmere-1") {
		if ev.Kind == alarm.VoltsPerHertz && ev.Message != raised {
			t.Errorf("held alarm says %q, want what raised it: %q", ev.Message, raised)
		}
	}
	for _, c := range []struct {
		k   alarm.Kind
		ctx alarm.Context
	}{
		{alarm.Stability, alarm.Context{QMvar: -100.5, QMinMvar: ptrF(-100)}},
		{alarm.Field, alarm.Context{QMvar: 200.5, QMaxMvar: ptrF(200), QMaxLimit: "field"}},
		{alarm.PrimeMover, alarm.Context{PMW: 340.5, PMaxMW: 340}},
	} {
		m := alarm.Message("u", c.k, alarm.Critical, alarm.Warning, -0.01, &c.ctx)
		if !strings.Contains(m, "0.5 ") || !strings.Contains(m, "beyond") || strings.Contains(m, "-0.5") {
			t.Errorf("%s: %q, want 0.5 ... beyond", c.k, m)
		}
	}
}

func ptrF(x float64) *float64 { return &x }
