package main

import (
	"bytes"
	"context"
	"log/slog"
	"os"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/fleet"
)

// TestMain lets the test binary be the bare sink too: the harness runs
// os.Executable() with -sink ADDR.
func TestMain(m *testing.M) {
	if len(os.Args) >= 3 && os.Args[1] == sinkFlag {
		os.Exit(runSink(os.Args[2], os.Args[3:]...))
	}
	os.Exit(m.Run())
}

// TestEncoder checks the hand-made request encoding against the
// generated code's, sample by sample.
func TestEncoder(t *testing.T) {
	fi, err := writeFleet(t.TempDir(), 7, 0)
	if err != nil {
		t.Fatal(err)
	}
	enc := encodeUnits(fi.Fleet, 3)
	base := time.Now().Add(-3 * 24 * time.Hour).Unix() // within the service's 7-day horizon
	gens := partition(enc, 2, base)
	if len(gens[0].units) != 4 || len(gens[1].units) != 3 {
		t.Fatalf("partition: %d and %d units, want 4 and 3", len(gens[0].units), len(gens[1].units))
	}
	g := gens[1] // units 1, 3, 5
	for seq := uint64(1); seq <= 3; seq++ {
		k0 := g.k
		var got pb.PushRequest
		if err := proto.Unmarshal(g.appendBatch(nil, seq, 5), &got); err != nil {
			t.Fatal(err)
		}
		want := &pb.PushRequest{Sequence: seq}
		for j := range uint64(5) {
			k := k0 + j
			u := g.units[k%3]
			round := k / 3
			var s pb.Sample
			if err := proto.Unmarshal(enc.rest(int(round%variants), u), &s); err != nil {
				t.Fatal(err)
			}
			s.UnitId = unitID(u)
			s.Time = timestamppb.New(time.Unix(base+int64(round), 0))
			want.Samples = append(want.Samples, &s)
		}
		if !proto.Equal(&got, want) {
			t.Fatalf("batch %d:\n got %v\nwant %v", seq, &got, want)
		}
	}
	if err := selfCheck(gens[0], 50); err != nil {
		t.Fatal(err)
	}
	// Every value within the bands the harness promises.
	for i, u := range fi.Fleet.Units {
		for k, pt := range unitPoints(i, u, newRand(9)) {
			r := u.Rating
			switch {
			case pt.P < u.PrimeMover.PMinMW || pt.P > u.PrimeMover.PMaxMW,
				pt.Q < -0.3*r.MVA || pt.Q > 0.3*r.MVA,
				pt.V < 0.97*r.KV || pt.V > 1.03*r.KV,
				pt.HasCoolant != (u.Coolant != nil),
				pt.HasField && (pt.Field <= 0 || pt.Field > u.Field.RatedA):
				t.Errorf("unit %s point %d: %+v", u.ID, k, pt)
			}
		}
	}
}

// TestFleetWithRegulators: the generated fleet with regulators parses
// without errors, has the share asked for on the avr basis, and every
// design and template combination has stable operation at rated power
// (the fleet reader warns where it has not).
func TestFleetWithRegulators(t *testing.T) {
	const n = 24 // every template with every design, twice
	fi, err := writeFleet(t.TempDir(), n, 0.75)
	if err != nil {
		t.Fatal(err)
	}
	if fi.AVR != 18 {
		t.Errorf("%d of %d units on the avr basis, want 18", fi.AVR, n)
	}
	_, ds, err := fleet.Load(fi.Path)
	if err != nil {
		t.Fatal(err)
	}
	if ds.Count(fleet.Warning) > 0 {
		t.Errorf("warnings:\n%s", ds)
	}
}

// TestHarness runs the whole harness in its short mode, the one CI
// runs: a few seconds at small scale, two runs (so that medians are
// taken), a fleet with some regulators. It must finish, every answer
// must add up, nothing may be rejected, and the report must carry the
// figures and weigh the targets. It makes no claim about speed.
func TestHarness(t *testing.T) {
	if testing.Short() {
		t.Skip("builds genvelope and runs it for a few seconds")
	}
	cfg := defaultConfig()
	cfg.Units, cfg.Streams, cfg.Window, cfg.Batch = 50, 2, 2, 40
	cfg.AVR, cfg.Repeat = 0.2, 2
	cfg.Warmup, cfg.Duration = 300*time.Millisecond, time.Second
	cfg.MetricsTries = 1
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	log := slog.New(slog.NewTextHandler(t.Output(), nil))
	rep, err := run(ctx, log, cfg)
	var table bytes.Buffer
	if rep != nil {
		rep.writeTable(&table)
		t.Log(table.String())
	}
	if err != nil {
		t.Fatal(err)
	}
	if !rep.Checks.OK {
		t.Fatalf("checks failed: %q", rep.Checks.Problems)
	}
	if len(rep.Runs) != 2 {
		t.Fatalf("runs: %+v", rep.Runs)
	}
	if rep.Fleet.AVR != 10 {
		t.Errorf("%d units on the avr basis, want 10", rep.Fleet.AVR)
	}
	for _, rr := range rep.Runs {
		if rr.Bare == nil || rr.Full == nil {
			t.Fatalf("run %d: %+v", rr.Run, rr)
		}
		for _, p := range []*phaseResult{rr.Bare, rr.Full} {
			if p.Batches == 0 || p.TotalSent == 0 || p.TotalAccepted != p.TotalSent || len(p.Rejected) != 0 || p.Mismatches != 0 || p.SeqErrors != 0 {
				t.Errorf("run %d %s: %+v", rr.Run, p.Server, p)
			}
		}
	}
	// The figures and the targets, as the lead reads them.
	s := rep.Summary
	if s == nil || s.Ratio == nil || s.FullCPUUS == nil || s.BareCPUUS == nil || !(s.FullCPUUS.Median > 0) {
		t.Fatalf("summary: %+v", s)
	}
	weighed := map[string]string{}
	for _, tg := range rep.Targets {
		weighed[tg.Name] = tg.Status
	}
	for _, name := range []string{"full/bare samples/s (median of 2)", "service ack latency p99, ms (median)", "service VmRSS after a full pass, MiB", "service VmHWM, MiB"} {
		if st, ok := weighed[name]; !ok || st == "" {
			t.Errorf("target %q not weighed: %v", name, weighed)
		}
	}
	for _, want := range []string{"targets:", ">= 0.8", "medians of 2 runs", "µs of server CPU a sample"} {
		if !bytes.Contains(table.Bytes(), []byte(want)) {
			t.Errorf("the table lacks %q", want)
		}
	}
	sv := rep.Service
	if sv == nil || sv.ExitCode == nil || *sv.ExitCode != 0 || rep.SinkExit == nil || *rep.SinkExit != 0 {
		t.Fatalf("exit codes: service %+v, sink %v", sv, rep.SinkExit)
	}
	if sv.AfterPass == nil || sv.AfterPass.RSSKiB <= 0 || sv.AfterPass.HWMKiB < sv.AfterPass.RSSKiB {
		t.Errorf("memory after pass: %+v", sv.AfterPass)
	}
	if len(sv.Scrapes) != 2 {
		t.Fatalf("scrapes: %+v", sv.Scrapes)
	}
	for _, sc := range sv.Scrapes {
		if sc.UnitsWithSamples != cfg.Units || sc.Series < cfg.Units {
			t.Errorf("scrape: %+v", sc)
		}
	}
}

// TestTimeLeft checks that a phase is refused once a server's synthetic
// time would reach the present (the service answers FUTURE_TIME 5 s
// ahead of its clock), and allowed while a minute or more is left.
func TestTimeLeft(t *testing.T) {
	fi, err := writeFleet(t.TempDir(), 4, 0)
	if err != nil {
		t.Fatal(err)
	}
	enc := encodeUnits(fi.Fleet, 3)
	now := time.Unix(1_800_000_000, 0)
	for _, tc := range []struct {
		name   string
		behind time.Duration // of the latest sample made
		ok     bool
	}{
		{"fresh run", loadAge, true},
		{"two minutes left", 2 * time.Minute, true},
		{"thirty seconds left", 30 * time.Second, false},
		{"in the future", -time.Hour, false},
	} {
		gens := partition(enc, 2, now.Add(-tc.behind).Unix())
		err := timeLeft(gens, now)
		if (err == nil) != tc.ok {
			t.Errorf("%s: timeLeft = %v, want ok %v", tc.name, err, tc.ok)
		}
	}
}
