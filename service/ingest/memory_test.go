package ingest

import (
	"runtime"
	"testing"
	"time"
)

// The live state a store holds per configured unit, measured on the
// heap: idle (configured, never reported), and after a full pass (a
// sample each, then the whole duplicate window). The fleet's own part
// (the parsed configuration, the engine's tables) is not counted here.
// The bounds are the Go allocator's size classes the layout falls in:
// 3,072 bytes for the Unit (2,704 with the alarms' rest cache), then
// 2,048 for the duplicate window and 2,304 for the trend ring with the
// first sample.
func TestMemoryPerUnit(t *testing.T) {
	const units = 2000
	fl := cloneFleet(t, units)
	heap := func() uint64 {
		var ms runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&ms)
		return ms.HeapAlloc
	}
	before := heap()
	s := NewStore(fl, Options{})
	idle := float64(heap()-before) / units
	now := t0.Add(time.Hour)
	for i := range ringSize {
		for _, c := range fl.Units {
			s.Accept(now, ptr(good(c.ID, t0.Add(time.Duration(i)*time.Second))))
		}
	}
	full := float64(heap()-before) / units
	runtime.KeepAlive(s)
	t.Logf("ingest state per unit: %.0f bytes idle, %.0f bytes after a full pass", idle, full)
	if idle > 3500 || full > 8000 {
		t.Errorf("%.0f bytes a unit idle, %.0f after a full pass; want at most 3,500 and 8,000", idle, full)
	}
}
