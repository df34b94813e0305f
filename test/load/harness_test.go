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
	fi, err := writeFleet(t.TempDir(), 7)
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

// TestHarness runs the whole harness with tiny numbers: it must finish,
// every answer must add up and nothing may be rejected. It makes no
// claim about speed.
func TestHarness(t *testing.T) {
	if testing.Short() {
		t.Skip("builds genvelope and runs it for a few seconds")
	}
	cfg := defaultConfig()
	cfg.Units, cfg.Streams, cfg.Window, cfg.Batch = 50, 1, 2, 40
	cfg.Warmup, cfg.Duration = 500*time.Millisecond, 1500*time.Millisecond
	cfg.MetricsTries = 1
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	log := slog.New(slog.NewTextHandler(t.Output(), nil))
	rep, err := run(ctx, log, cfg)
	if rep != nil {
		var b bytes.Buffer
		rep.writeTable(&b)
		t.Log(b.String())
	}
	if err != nil {
		t.Fatal(err)
	}
	if !rep.Checks.OK {
		t.Fatalf("checks failed: %q", rep.Checks.Problems)
	}
	if len(rep.Runs) != 1 || rep.Runs[0].Bare == nil || rep.Runs[0].Full == nil {
		t.Fatalf("runs: %+v", rep.Runs)
	}
	for _, p := range []*phaseResult{rep.Runs[0].Bare, rep.Runs[0].Full} {
		if p.Batches == 0 || p.TotalSent == 0 || p.TotalAccepted != p.TotalSent || len(p.Rejected) != 0 || p.Mismatches != 0 || p.SeqErrors != 0 {
			t.Errorf("%s: %+v", p.Server, p)
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
