package metrics

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
)

var updateGolden = flag.Bool("update-golden", false, "rewrite testdata/fleet.prom from the text writer")

// goldenStore is a fleet of 24 copies of the example units in every
// state a scrape shows: no sample, fresh, stale, alarms raised,
// acknowledged and shelved, limiters timing, label values to escape.
func goldenStore(t testing.TB) (*ingest.Store, time.Time) {
	t.Helper()
	ex, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	fl := &fleet.Fleet{}
	for i := range 24 {
		c := *ex.Units[i%len(ex.Units)]
		c.ID = fmt.Sprintf("gold-%02d", i)
		c.Site = fmt.Sprintf("site-%d", i/5)
		if i == 7 {
			c.ID, c.Name, c.Site = `gold "7" \ b`, "Unit \"seven\"\nof the site", `a\b`
		}
		fl.Units = append(fl.Units, &c)
	}
	at := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	s := ingest.NewStore(fl, ingest.Options{Now: func() time.Time { return at }})
	for i, u := range fl.Units {
		if i%6 == 5 {
			continue // never reported
		}
		mva, kv := u.Rating.MVA, u.Rating.KV
		// Spread over the chart: inside, towards q_max, past it, towards q_min.
		p := []float64{0.5, 0.8, 0.95, 0.3, 0.7, 0.9}[i%6] * mva
		q := []float64{0.1, 0.45, 0.7, -0.35, 0.2, -0.5}[i%6] * mva
		for k := range 6 {
			smp := ingest.Sample{UnitID: u.ID, Time: at.Add(time.Duration(k-6) * time.Second), PMW: p, QMvar: q + float64(k),
				VKV: kv * (0.98 + 0.01*float64(i%5)), FrequencyHz: 50, HasFreq: i%2 == 0}
			if u.Field.AirGapA > 0 && i%3 != 2 {
				smp.FieldA, smp.HasFieldA = (1.1+0.05*float64(i%4))*u.Model.RatedFieldCurrent()*u.Field.AirGapA, true
			}
			if r, d := s.Accept(at, &smp); r != ingest.Accepted {
				t.Fatalf("%s: %v %s", u.ID, r, d)
			}
		}
	}
	// A few operator actions on raised alarms.
	acked, shelved := 0, 0
	for _, ev := range s.Active() {
		switch {
		case acked < 3:
			if err := s.Acknowledge(ev.Unit, ev.Kind, at, "op"); err != nil {
				t.Fatal(err)
			}
			acked++
		case shelved < 2:
			if err := s.Shelve(ev.Unit, ev.Kind, at.Add(time.Hour), at, "op"); err != nil {
				t.Fatal(err)
			}
			shelved++
		}
	}
	if acked == 0 || shelved == 0 {
		t.Fatalf("the golden fleet raised too few alarms: %d acknowledged, %d shelved", acked, shelved)
	}
	// Ten minutes later the units are stale, but for those that report again.
	later := at.Add(10 * time.Minute)
	s.Sweep(later)
	for i, u := range fl.Units {
		if i%4 == 1 {
			smp := ingest.Sample{UnitID: u.ID, Time: later.Add(-time.Second), PMW: 0.6 * u.Rating.MVA, QMvar: 0.1 * u.Rating.MVA, VKV: u.Rating.KV}
			if r, d := s.Accept(later, &smp); r != ingest.Accepted {
				t.Fatalf("%s: %v %s", u.ID, r, d)
			}
		}
	}
	return s, later
}

// TestWriteTextGolden holds the text writer's output, byte for byte, to
// the file it wrote before its speed-ups (testdata/fleet.prom, written
// by the writer of 4ff9b46): a faster scrape must expose the same series
// with the same values in the same order. (Its meaning is checked
// against client_golang's registry by TestWriteTextMatchesRegistry.)
// After an intended change of the exposition, rewrite the file with
// go test -run TestWriteTextGolden -update-golden ./service/metrics.
func TestWriteTextGolden(t *testing.T) {
	s, later := goldenStore(t)
	c := NewCollector(s, func() time.Time { return later })
	path := filepath.Join("testdata", "fleet.prom")
	// The second scrape reuses what the first kept; the third goes in
	// chunks of 1,000 bytes; the fourth and fifth walk the units in 3 and
	// 24 parallel runs.
	for try := range 5 {
		switch try {
		case 2:
			c.chunk = 1000
		case 3:
			c.runs = 3
		case 4:
			c.runs = 24
		}
		var got bytes.Buffer
		if err := c.WriteText(&got); err != nil {
			t.Fatal(err)
		}
		if *updateGolden && try == 0 {
			if err := os.MkdirAll("testdata", 0o755); err != nil {
				t.Fatal(err)
			}
			if err := os.WriteFile(path, got.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}
		}
		want, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got.Bytes(), want) {
			g, w := bytes.Split(got.Bytes(), []byte("\n")), bytes.Split(want, []byte("\n"))
			for i := 0; i < len(g) && i < len(w); i++ {
				if !bytes.Equal(g[i], w[i]) {
					t.Fatalf("scrape %d: line %d differs:\n got %s\nwant %s", try+1, i+1, g[i], w[i])
				}
			}
			t.Fatalf("scrape %d: %d lines, want %d", try+1, len(g), len(w))
		}
	}
}

// appendValue writes what client_golang's text encoder writes for a
// value: strconv's shortest 'g' form (the library is the reference),
// with the integer shortcut on both sides of its bounds.
func TestAppendValue(t *testing.T) {
	for _, v := range []float64{0, math.Copysign(0, -1), 1, -1, 2, 42, 999999, -999999, 1e6, -1e6, 1e6 + 1, 123456.5,
		0.5, -0.25, 1e-5, 3e21, 1 << 53, math.MaxInt64, math.SmallestNonzeroFloat64, 299792458, 0.1 + 0.2} {
		want := strconv.FormatFloat(v, 'g', -1, 64)
		if got := string(appendValue(nil, v)); got != want {
			t.Errorf("appendValue(%v) = %s, want %s", v, got, want)
		}
	}
	for v, want := range map[float64]string{math.NaN(): "NaN", math.Inf(1): "+Inf", math.Inf(-1): "-Inf"} {
		if got := string(appendValue(nil, v)); got != want {
			t.Errorf("appendValue(%v) = %s, want %s", v, got, want)
		}
	}
}

// A scrape whose writer fails stops and reports the error, and a
// scrape larger than a chunk arrives whole through the pipe.
func TestWriteTextWriter(t *testing.T) {
	s, later := goldenStore(t)
	c := NewCollector(s, func() time.Time { return later })
	var whole bytes.Buffer
	if err := c.WriteText(&whole); err != nil {
		t.Fatal(err)
	}
	c.chunk, c.runs = 1000, 2
	for _, n := range []int{0, 100, whole.Len() / 2} {
		w := &failingWriter{left: n}
		if err := c.WriteText(w); !errors.Is(err, errWriteFailed) {
			t.Errorf("writer failing after %d bytes: err %v", n, err)
		}
		if !bytes.HasPrefix(whole.Bytes(), w.got.Bytes()) {
			t.Errorf("writer failing after %d bytes: what was written is not the start of the scrape", n)
		}
	}
}

var errWriteFailed = errors.New("write failed")

type failingWriter struct {
	left int
	got  bytes.Buffer
}

func (w *failingWriter) Write(p []byte) (int, error) {
	if len(p) > w.left {
		w.got.Write(p[:w.left])
		n := w.left
		w.left = 0
		return n, errWriteFailed
	}
	w.left -= len(p)
	return w.got.Write(p)
}
