package ingest

import (
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
)

// A unit driven towards its underexcited limit raises the stability
// alarm, and the event carries Q and the practical stability limit in
// Mvar as the engine computes them for that sample.
func TestStabilityAlarmEventInEngineeringUnits(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	w := s.Hub().Watch(64, func(e *alarm.Event) bool { return e.Kind == alarm.Stability })
	defer w.Close()
	u := fl.Unit("harrowmere-1")
	b := u.Base
	pMW, vKV := 130.0, 20.0
	bounds := u.Model.Bounds(b.PowerPU(pMW), b.VoltagePU(vKV), 1, 1, nil)
	qLimit := b.PowerMW(bounds.Practical.V)
	now := t0.Add(time.Hour)
	var got *alarm.Event
	for i := 0; i < 120 && got == nil; i++ {
		q := qLimit + 40 - float64(i) // one Mvar a second towards the limit
		smp := Sample{UnitID: u.ID, Time: t0.Add(time.Duration(i) * time.Second), PMW: pMW, QMvar: q, VKV: vKV}
		if r, d := s.Accept(now, &smp); r != Accepted {
			t.Fatalf("%v %s", r, d)
		}
		select {
		case ev := <-w.C:
			got = &ev
		default:
		}
	}
	if got == nil {
		t.Fatal("no stability alarm")
	}
	// The service reads an avr unit's limit from its table, within 0.002 pu
	// of the direct computation (the limits contract).
	if got.Level != alarm.Warning || got.Units != "Mvar" || math.Abs(got.LimitAt-qLimit) > 0.002*u.Rating.MVA {
		t.Errorf("event %+v; want a warning with the limit %.3f Mvar", got, qLimit)
	}
	// The margin is (Q - q_practical)/S_rated (envelope contract), so Q
	// in the event is the limit plus margin times rated MVA.
	if math.Abs(got.Actual-(got.LimitAt+got.Value*u.Rating.MVA)) > 1e-6 {
		t.Errorf("Q %.3f Mvar, margin %.4f, limit %.3f: inconsistent", got.Actual, got.Value, got.LimitAt)
	}
	// The sentence names the stability limit itself, not q_min (which the
	// UEL or the end region sets here).
	if want := fmt.Sprintf("below the practical stability limit (%.1f Mvar)", got.LimitAt); !strings.Contains(got.Message, want) &&
		!strings.Contains(got.Message, fmt.Sprintf("left above the practical stability limit (%.1f Mvar)", got.LimitAt)) {
		t.Errorf("message %q does not name the stability limit %.1f Mvar", got.Message, got.LimitAt)
	}
}

// The field alarm of a QUESTIONABLE sample speaks of the field current
// the engine used, the model's, not of the reading it ignored; its
// sentence does not quote the reading as measured.
func TestFieldAlarmUsesThePointAsEvaluated(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	u := fl.Unit("harrowmere-1")
	b := u.Base
	coolant := u.Coolant.Points[len(u.Coolant.Points)-1].At
	now := t0.Add(time.Hour)
	for i := range 4 {
		// Beyond the model's field limit (q_max ≈ 226 Mvar here), with a
		// low, ignored reading of 500 A.
		smp := Sample{UnitID: u.ID, Time: t0.Add(time.Duration(i) * 10 * time.Second), PMW: 300, QMvar: 240, VKV: 20.4,
			Coolant: coolant, HasCoolant: true, FieldA: 500, HasFieldA: true, Quality: QualityQuestionable}
		if r, d := s.Accept(now, &smp); r != Accepted {
			t.Fatalf("%v %s", r, d)
		}
	}
	v := s.Unit(u.ID).View()
	if math.Abs(v.Eval.FieldCurrent-v.Eval.IfdModel) > 1e-12 {
		t.Fatalf("the engine used the low QUESTIONABLE reading (%g pu), not the larger model (%g pu)", v.Eval.FieldCurrent, v.Eval.IfdModel)
	}
	var ev *alarm.Event
	for _, e := range s.ActiveOf(u.ID) {
		if e.Kind == alarm.Field {
			ev = &e
		}
	}
	if ev == nil {
		t.Fatal("no field alarm")
	}
	if want := b.FieldA(v.Eval.IfdModel); math.Abs(ev.Actual-want) > 1e-6 {
		t.Errorf("field alarm's current %.1f A, want the model's %.1f A (the reading of 500 A was not used)", ev.Actual, want)
	}
}
