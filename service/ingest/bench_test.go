package ingest

import (
	"encoding/json"
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

// BenchmarkSaveState is one save of 10,000 units with full duplicate
// windows: the binary stream the saver writes against the JSON of
// version 2 (a snapshot copied, then encoded).
func BenchmarkSaveState(b *testing.B) {
	fl := cloneFleet(b, 10000)
	now := t0.Add(time.Hour)
	s := NewStore(fl, Options{})
	for i := range ringSize {
		for _, c := range fl.Units {
			s.Accept(now, ptr(good(c.ID, t0.Add(time.Duration(i)*time.Second))))
		}
	}
	b.Run("binary", func(b *testing.B) {
		b.ReportAllocs()
		for range b.N {
			var n countWriter
			if err := s.EncodeState(&n, now); err != nil {
				b.Fatal(err)
			}
			b.ReportMetric(float64(n), "bytes/save")
		}
	})
	b.Run("json", func(b *testing.B) {
		b.ReportAllocs()
		for range b.N {
			data, err := json.Marshal(s.Snapshot(now))
			if err != nil {
				b.Fatal(err)
			}
			b.ReportMetric(float64(len(data)), "bytes/save")
		}
	})
}

type countWriter int

func (c *countWriter) Write(p []byte) (int, error) { *c += countWriter(len(p)); return len(p), nil }
