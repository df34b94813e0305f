package metrics

import (
	"fmt"
	"io"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
)

// BenchmarkWriteText is one scrape of the fleet families of 10,000 units
// (copies of the example fleet's units), each with a sample, written to
// a discarding writer (no gzip), after a first scrape.
func BenchmarkWriteText(b *testing.B) {
	ex, err := examples.Fleet()
	if err != nil {
		b.Fatal(err)
	}
	fl := &fleet.Fleet{}
	for i := range 10000 {
		c := *ex.Units[i%len(ex.Units)]
		c.ID = fmt.Sprintf("syn-%05d", i)
		c.Site = fmt.Sprintf("site-%03d", i/4)
		fl.Units = append(fl.Units, &c)
	}
	now := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	s := ingest.NewStore(fl, ingest.Options{Now: func() time.Time { return now }})
	for _, u := range fl.Units {
		smp := ingest.Sample{UnitID: u.ID, Time: now.Add(-time.Second), PMW: 0.6 * u.Rating.MVA, QMvar: 0.1 * u.Rating.MVA, VKV: u.Rating.KV}
		if r, d := s.Accept(now, &smp); r != ingest.Accepted {
			b.Fatalf("%s: %v %s", u.ID, r, d)
		}
	}
	c := NewCollector(s, func() time.Time { return now })
	// A scrape before the timer: the rotor modes of the avr units are
	// solved there, as at a service's first scrape, and the families'
	// lengths learnt; the loop measures the scrapes that follow.
	if err := c.WriteText(io.Discard); err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for range b.N {
		if err := c.WriteText(io.Discard); err != nil {
			b.Fatal(err)
		}
	}
}
