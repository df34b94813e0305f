package ingest

import (
	"bytes"
	"fmt"
	"math"
	"regexp"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/fleet"
)

// bigFleet returns a fleet of n units: copies of the example fleet's
// three, each parsed on its own (its own model in memory), with ids
// harrowmere-1-00001 and so on, on the given stability basis.
func bigFleet(tb testing.TB, n int, basis string) *fleet.Fleet {
	tb.Helper()
	src := examples.FleetYAML()
	at := bytes.Index(src, []byte("\nunits:\n"))
	blocks := regexp.MustCompile(`(?m)^  - id: `).Split(string(src[at+len("\nunits:\n"):]), -1)[1:]
	var b bytes.Buffer
	b.WriteString("units:\n")
	for i := range n {
		blk := blocks[i%len(blocks)]
		id, rest, _ := bytes.Cut([]byte(blk), []byte("\n"))
		fmt.Fprintf(&b, "  - id: %s-%05d\n    stability: {basis: %s}\n%s", id, i+1, basis, rest)
	}
	fl, ds := fleet.Parse("big.yaml", b.Bytes())
	if ds.HasErrors() || len(fl.Units) != n {
		tb.Fatalf("big fleet: %d units, %v", len(fl.Units), ds)
	}
	return fl
}

// fleetSamples returns, for each unit of fl, 64 points on a closed loop
// around a quarter of its rating (P, Q, V and, on every other unit, a
// field current), one a second.
func fleetSamples(fl *fleet.Fleet) [][64]Sample {
	out := make([][64]Sample, len(fl.Units))
	for i, u := range fl.Units {
		r := u.Rating
		for k := range 64 {
			a := 2 * math.Pi * float64(k) / 64
			s := Sample{UnitID: u.ID, PMW: r.MVA * (0.5 + 0.1*math.Sin(a)), QMvar: r.MVA * 0.15 * math.Cos(a), VKV: r.KV * (1 + 0.01*math.Sin(3*a))}
			if u.Coolant != nil {
				s.Coolant, s.HasCoolant = u.Coolant.Points[len(u.Coolant.Points)-1].At, true
			}
			out[i][k] = s
		}
	}
	return out
}

// BenchmarkAcceptFleet is ingest's per-sample cost over a fleet whose
// state does not fit in cache: one stream going round n units, as the
// load harness does, through a Resolver (ns/op is per sample), on the
// manual and the avr stability basis.
func BenchmarkAcceptFleet(b *testing.B) {
	for _, basis := range []string{"manual", "avr"} {
		const n = 1000
		b.Run(basis, func(b *testing.B) {
			fl := bigFleet(b, n, basis)
			smps := fleetSamples(fl)
			s := NewStore(fl, Options{})
			var r Resolver
			now := time.Now()
			base := now.Add(-24 * time.Hour)
			for i := range n { // every unit once: tables built, state touched
				smp := smps[i][0]
				smp.Time = base.Add(-time.Second)
				if res, d := s.AcceptFrom(&r, now, &smp); res != Accepted {
					b.Fatalf("%v %s", res, d)
				}
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := range b.N {
				u, round := i%n, i/n
				smp := smps[u][round%64]
				smp.Time = base.Add(time.Duration(round) * time.Second)
				if res, d := s.AcceptFrom(&r, now, &smp); res != Accepted {
					b.Fatalf("%v %s", res, d)
				}
			}
		})
	}
}
