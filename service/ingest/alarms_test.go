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
