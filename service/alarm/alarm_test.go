package alarm

import (
	"math"
	"testing"
	"time"
)

const sec = int64(time.Second)

// A margin dithering around the warning threshold raises one alarm, not
// many: deadband, on-delay and off-delay are the ANSI/ISA-18.2 means
// against chattering (ANSI/ISA-18.2 / IEC 62682, from memory), and that
// standard counts over 10 alarms per 10 minutes per operator as a flood.
func TestDitherRaisesOneAlarm(t *testing.T) {
	s := Setting{Warning: 0.05, Critical: 0, Deadband: 0.01, OnDelay: 5 * time.Second, OffDelay: 30 * time.Second}
	none := Setting{Warning: 0.05, Critical: 0}
	var m, bare Machine
	changes, bareChanges := 0, 0
	// Ten minutes at one sample a second, the margin swinging ±0.008
	// around the threshold after a slow approach.
	for i := range 600 {
		x := 0.046 + 0.008*math.Sin(float64(i)*0.3)
		if i < 60 {
			x = 0.2 - 0.0025*float64(i)
		}
		if _, changed := m.Step(int64(i)*sec, x, &s, false); changed {
			changes++
		}
		if _, changed := bare.Step(int64(i)*sec, x, &none, false); changed {
			bareChanges++
		}
	}
	if changes != 1 || m.Level != Warning {
		t.Errorf("%d level changes, level %v; want one change to warning", changes, m.Level)
	}
	// The same margin with no deadband and no delays: a flood.
	if bareChanges <= 20 {
		t.Errorf("without deadband and delays only %d changes; the test signal does not dither", bareChanges)
	}
}

func TestOnDelay(t *testing.T) {
	s := Setting{Warning: 0.05, Critical: 0, OnDelay: 5 * time.Second}
	var m Machine
	for i := range 5 {
		m.Step(int64(i)*sec, 0.04, &s, false)
		if m.Level != Normal {
			t.Fatalf("raised after %d s, before the 5 s on-delay", i)
		}
	}
	m.Step(5*sec, 0.04, &s, false)
	if m.Level != Warning {
		t.Fatalf("not raised after the on-delay: %v", m.Level)
	}
	// A dip shorter than the on-delay does not raise.
	var n Machine
	for i, x := range []float64{0.04, 0.04, 0.06, 0.04, 0.04, 0.04, 0.04, 0.06} {
		n.Step(int64(i)*sec, x, &s, false)
	}
	if n.Level != Normal {
		t.Errorf("interrupted condition raised the alarm")
	}
}

func TestOffDelayAndDeadband(t *testing.T) {
	s := Setting{Warning: 0.05, Critical: 0, Deadband: 0.01, OffDelay: 10 * time.Second}
	var m Machine
	m.Step(0, 0.04, &s, false)
	if m.Level != Warning {
		t.Fatal("no on-delay: should raise at once")
	}
	// Inside the deadband: stays.
	for i := 1; i < 30; i++ {
		m.Step(int64(i)*sec, 0.055, &s, false)
	}
	if m.Level != Warning {
		t.Fatal("fell inside the deadband")
	}
	// Clear of the deadband, but for less than the off-delay.
	for i := 30; i < 39; i++ {
		m.Step(int64(i)*sec, 0.07, &s, false)
	}
	if m.Level != Warning {
		t.Fatal("fell before the off-delay")
	}
	m.Step(40*sec, 0.07, &s, false)
	if m.Level != Normal {
		t.Fatal("did not fall after the off-delay")
	}
}

func TestLevelsAndAcknowledgement(t *testing.T) {
	s := Setting{Warning: 0.5, Critical: 0.9}
	var m Machine
	if _, ch := m.Step(0, 0.95, &s, true); !ch || m.Level != Critical {
		t.Fatalf("rising quantity past critical: %v", m.Level)
	}
	m.Acknowledged = true
	m.Step(sec, 0.7, &s, true)
	if m.Level != Warning || !m.Acknowledged {
		t.Fatalf("falling to warning keeps the acknowledgement: level %v ack %v", m.Level, m.Acknowledged)
	}
	m.Step(2*sec, 0.95, &s, true)
	if m.Level != Critical || m.Acknowledged {
		t.Fatalf("a rise needs a new acknowledgement: level %v ack %v", m.Level, m.Acknowledged)
	}
	m.Step(3*sec, math.NaN(), &s, true)
	if m.Level != Critical {
		t.Fatal("a missing quantity must not clear an alarm by itself")
	}
}

func TestSettingCheck(t *testing.T) {
	if msg := (Setting{Warning: 0.05, Critical: 0.1}).Check(Stability); msg == "" {
		t.Error("critical above warning on a falling margin must be refused")
	}
	if msg := (Setting{Warning: 30, Critical: 10}).Check(StaleTelemetry); msg == "" {
		t.Error("critical below warning on a rising quantity must be refused")
	}
	for k, s := range Defaults() {
		if msg := s.Check(Kind(k)); msg != "" {
			t.Errorf("default for %v: %s", Kind(k), msg)
		}
	}
}

func TestHubDropsSlowWatcher(t *testing.T) {
	h := NewHub()
	slow := h.Watch(2, nil)
	fast := h.Watch(100, func(e *Event) bool { return e.Unit == "a" })
	for range 5 {
		h.Publish(Event{Unit: "a"})
		h.Publish(Event{Unit: "b"})
	}
	select {
	case <-slow.Overflowed:
	default:
		t.Fatal("slow watcher not dropped")
	}
	if len(fast.C) != 5 || h.Watchers() != 1 {
		t.Errorf("fast watcher got %d events; %d watchers left", len(fast.C), h.Watchers())
	}
	fast.Close()
	if h.Watchers() != 0 {
		t.Error("Close did not unregister")
	}
}
