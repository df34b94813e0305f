package ingest

import (
	"testing"
	"time"
)

// BenchmarkAccept is the per-sample cost of ingest after decoding: the
// checks, the evaluation, the thermal accumulators and the alarms, for
// one unit's slowly moving telemetry.
func BenchmarkAccept(b *testing.B) {
	s := NewStore(exampleFleet(b), Options{})
	now := time.Now()
	base := now.Add(-24 * time.Hour)
	b.ReportAllocs()
	for i := range b.N {
		smp := Sample{UnitID: "harrowmere-1", Time: base.Add(time.Duration(i) * time.Millisecond),
			PMW: 250 + float64(i%100)*0.1, QMvar: 80, VKV: 20.1, Coolant: 400, HasCoolant: true}
		if r, d := s.Accept(now, &smp); r != Accepted {
			b.Fatalf("%v %s", r, d)
		}
	}
}
