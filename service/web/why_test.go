package web

import (
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
)

// The overview tells live, stale and no-data units apart, from the
// View: no accepted sample is no data; telemetry older than the stale
// telemetry warning threshold (30 s by default) is stale.
func TestOverviewStates(t *testing.T) {
	for _, tc := range []struct {
		name      string
		push      bool
		later     time.Duration // wall clock moved on after the samples
		want      string
		stale, nd int
	}{
		{"no data", false, 0, "no data", 0, 3},
		{"live", true, 10 * time.Second, "live", 0, 0},
		{"stale", true, 45 * time.Second, "stale", 3, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := newFixture(t, nil)
			if tc.push {
				f.normal(t)
			}
			f.now = f.now.Add(tc.later)
			f.store.Sweep(f.now) // as the server does once a second
			d := f.ui.fleetData()
			for _, r := range d.Rows {
				if r.State.Word != tc.want {
					t.Errorf("%s: state %q, want %q", r.ID, r.State.Word, tc.want)
				}
				if tc.want != "live" && r.Badge.Word == "normal" {
					t.Errorf("%s: badge %q, want %q or an alarm level, never normal", r.ID, r.Badge.Word, tc.want)
				}
				if tc.want == "no data" && r.Cause.Title != "No data" {
					t.Errorf("%s: cause %+v", r.ID, r.Cause)
				}
			}
			if d.Stale != tc.stale || d.NoData != tc.nd {
				t.Errorf("summary: %d stale, %d no data; want %d, %d", d.Stale, d.NoData, tc.stale, tc.nd)
			}
			if tc.want == "stale" {
				ud := f.ui.unitData(f.store.Unit("harrowmere-1"))
				for _, th := range ud.Thermal {
					if th.Used.Text != "unknown (stale)" || th.Level.Word == "normal" {
						t.Errorf("stale unit's %s: %q, %q; want unknown, never normal", th.Title, th.Used.Text, th.Level.Word)
					}
				}
			}
			body := f.get(t, "/").body
			if tc.want != "live" && !strings.Contains(body, `data-state="`+tc.want+`"`) {
				t.Errorf("the overview does not mark %q", tc.want)
			}
		})
	}
}

// The cause is the worst active alarm that is not shelved, with its
// sentence.
func TestOverviewCause(t *testing.T) {
	f := newFixture(t, nil)
	f.normal(t)
	f.overField(t) // field critical, armature warning
	cause := func() cause {
		for _, r := range f.ui.fleetData().Rows {
			if r.ID == "harrowmere-1" {
				return r.Cause
			}
		}
		t.Fatal("no row")
		return cause{}
	}
	c := cause()
	if c.Kind != "field" || c.Title != "Field current" || c.Level.Word != "critical" || !strings.Contains(c.Message, "field current limit") || strings.HasPrefix(c.Message, "harrowmere-1") {
		t.Errorf("cause %+v, want the field alarm and its sentence", c)
	}
	if err := f.store.Acknowledge("harrowmere-1", alarm.Field, f.now, "test"); err != nil {
		t.Fatal(err)
	}
	if c := cause(); c.Kind != "field" {
		t.Errorf("acknowledged, the critical alarm is still the cause; got %q", c.Kind)
	}
	if err := f.store.Shelve("harrowmere-1", alarm.Field, f.now.Add(time.Hour), f.now, "test"); err != nil {
		t.Fatal(err)
	}
	if c := cause(); c.Kind != "armature" || c.Level.Word != "warning" {
		t.Errorf("with the field alarm shelved the cause is %+v, want the armature warning", c)
	}
	body := f.get(t, "/").body
	if !strings.Contains(body, `data-cause="armature"`) {
		t.Error("the overview does not show the cause")
	}
}

// Units whose margins differ by less than marginStep keep their order by
// id; a larger difference orders them by margin.
func TestOverviewStableOrder(t *testing.T) {
	for _, tc := range []struct {
		a, b float64
		same bool
	}{
		{0.2031, 0.2049, true},
		{0.2049, 0.2031, true},
		{0.195, 0.215, false},
		{-0.001, 0.001, false},
	} {
		if got := marginRank(tc.a) == marginRank(tc.b); got != tc.same {
			t.Errorf("margins %g and %g: same rank %v, want %v", tc.a, tc.b, got, tc.same)
		}
	}
	// Two refreshes with a dithering margin give the same order.
	f := newFixture(t, nil)
	var orders []string
	for i, q := range []float64{60, 60.2, 59.8} {
		at := f.now.Add(time.Duration(i-10) * time.Second)
		f.push(t, "harrowmere-1", at, 280, q, 20.2)
		f.push(t, "larchwater-2", at, 70, 10, 13.8)
		f.push(t, "brindle-gt3", at, 100, 20, 15.1)
		var ids []string
		for _, r := range f.ui.fleetData().Rows {
			ids = append(ids, r.ID)
		}
		orders = append(orders, strings.Join(ids, " "))
	}
	for _, o := range orders[1:] {
		if o != orders[0] {
			t.Errorf("the order changed with a margin dithering by 0.2 Mvar: %q", orders)
		}
	}
}

// A QUESTIONABLE sample is marked where its numbers are shown, and its
// field current, which the engine does not use, is not shown as the
// measured field current.
func TestQuestionableSample(t *testing.T) {
	f := newFixture(t, nil)
	s := ingest.Sample{UnitID: "larchwater-2", Time: f.now.Add(-time.Second), PMW: 70, QMvar: 10, VKV: 13.8,
		FieldA: 900, HasFieldA: true, Quality: ingest.QualityQuestionable}
	if r, d := f.store.Accept(f.now, &s); r != ingest.Accepted {
		t.Fatalf("%v %s", r, d)
	}
	page := f.get(t, "/units/larchwater-2").body
	wantContains(t, "unit page", page, "<s>900 A</s>", "not used", "QUESTIONABLE", "? questionable")
	wantContains(t, "overview", f.get(t, "/").body, "is-questionable", "? questionable")
}

// A negative Q (absorbing) is no fault: only a negative headroom is shown
// as one.
func TestNegativeQIsNoFault(t *testing.T) {
	f := newFixture(t, nil)
	f.push(t, "larchwater-2", f.now.Add(-time.Second), 60, -20, 13.8)
	page := f.get(t, "/units/larchwater-2").body
	i := strings.Index(page, `data-value="q_mvar"`)
	j := strings.LastIndex(page[:i], `<div class="tile`)
	if j < 0 || strings.Contains(page[j:i], "is-neg") {
		t.Errorf("the Q tile of an underexcited unit is marked as a fault: %s", page[max(0, j):i])
	}
}

// The worst alarm: the highest level; at the same level one not yet
// acknowledged; then the one raised first; shelved alarms do not count.
func TestWorstAlarm(t *testing.T) {
	now := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	type m = alarm.Machine
	for _, tc := range []struct {
		name   string
		set    map[alarm.Kind]m
		want   alarm.Kind
		wantOK bool
	}{
		{"none", nil, 0, false},
		{"level first", map[alarm.Kind]m{alarm.Armature: {Level: alarm.Warning, Since: 1}, alarm.VoltsPerHertz: {Level: alarm.Critical, Since: 5}}, alarm.VoltsPerHertz, true},
		{"not acknowledged first", map[alarm.Kind]m{alarm.Armature: {Level: alarm.Critical, Acknowledged: true, Since: 1}, alarm.Field: {Level: alarm.Critical, Since: 5}}, alarm.Field, true},
		{"raised first", map[alarm.Kind]m{alarm.StaleTelemetry: {Level: alarm.Warning, Since: 9}, alarm.VoltageFrequencyZone: {Level: alarm.Warning, Since: 3}}, alarm.VoltageFrequencyZone, true},
		{"shelved ignored", map[alarm.Kind]m{alarm.Field: {Level: alarm.Critical, ShelvedUntil: now.Add(time.Hour).UnixNano()}, alarm.Armature: {Level: alarm.Warning}}, alarm.Armature, true},
	} {
		var v ingest.View
		for k, x := range tc.set {
			v.Alarms[k] = x
		}
		got, ok := worstAlarm(&v, now)
		if ok != tc.wantOK || ok && got != tc.want {
			t.Errorf("%s: %v %v, want %v %v", tc.name, got, ok, tc.want, tc.wantOK)
		}
	}
}
