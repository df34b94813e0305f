package server_test

import (
	"context"
	"fmt"
	"runtime"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/rpc"
	"github.com/genvelope/genvelope/service/server"
)

// A watcher that never reads is ended, and ingest is not held up by it:
// the hub never waits on a watcher (alarm.Hub), so the server drops one
// that falls rpc.DefaultWatchBuffer events behind, ends its stream with
// RESOURCE_EXHAUSTED after the events already sent, and leaves nothing of
// it running. Every batch beside the stuck watcher is answered (a held-up
// hub would block them); throughput with and without it is measured and
// logged only, since a timed assertion would fail on a loaded machine
// (speed is the load harness's job).
func TestStuckWatcherIsDropped(t *testing.T) {
	if testing.Short() {
		t.Skip("thousands of alarm transitions; skipped under -short")
	}
	// Ten units whose prime-mover alarm has no deadband and no delays,
	// so that a margin alternating 0.04, 0.06 changes level on every
	// sample: every accepted sample publishes one event.
	const nUnits = 10
	var units []string
	var blocks []string
	for i := range nUnits {
		id := fmt.Sprintf("flood-%02d", i)
		units = append(units, id)
		blocks = append(blocks, larchwater(id, ""))
	}
	path := fleetWith(t, "alarms:\n  on_delay_s: 0\n  off_delay_s: 0\n  limits:\n    prime_mover: {deadband: 0}\n", blocks...)
	r := start(t, server.Config{FleetPath: path})
	ctx := ctxT(t)
	hub := r.srv.Store().Hub()
	idle := hub.Watchers() // 0 today: watchers of the server's own, should it get any

	const perUnit = 10 // samples of each unit per batch
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	seq := 0
	batch := func() *pb.PushRequest {
		req := &pb.PushRequest{Sequence: uint64(seq)}
		for k := range perUnit {
			i := seq*perUnit + k
			m := 0.04
			if i%2 == 1 {
				m = 0.06
			}
			for _, u := range units {
				req.Samples = append(req.Samples, sample(u, t0.Add(time.Duration(i)*10*time.Millisecond), larchwaterP(m), 20, 13.8))
			}
		}
		seq++
		return req
	}
	// phase is the ingest rate over some batches: all of them, and those
	// pushed while a watcher was registered.
	type phase struct {
		all, watched rate
	}
	// run pushes n batches, built beforehand, and times them.
	run := func(n int) phase {
		reqs := make([]*pb.PushRequest, n)
		for b := range reqs {
			reqs[b] = batch()
		}
		var p phase
		for _, req := range reqs {
			watched := hub.Watchers() > idle
			begin := time.Now()
			resp, err := r.tel.Push(ctx, req)
			d := time.Since(begin)
			if err != nil || int(resp.Accepted) != len(req.Samples) {
				t.Fatalf("batch %d: %v, %v", req.Sequence, resp, err)
			}
			p.all.add(len(req.Samples), d)
			if watched {
				p.watched.add(len(req.Samples), d)
			}
		}
		return p
	}
	const batches = 100 // of nUnits × perUnit samples, each an alarm transition
	run(10)             // warm up: connection, first evaluations
	first := run(batches)
	before := r.srv.Store().Transitions()

	// The stuck client: its own connection with the smallest HTTP/2
	// windows grpc-go allows (64 KiB; a fixed window also turns off the
	// dynamic BDP window), so that the server's sends block soon.
	conn, err := grpc.NewClient(r.srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithInitialWindowSize(64<<10), grpc.WithInitialConnWindowSize(64<<10))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	stuck, err := pb.NewAlarmServiceClient(conn).WatchAlarms(wctx, &pb.WatchAlarmsRequest{})
	if err != nil {
		t.Fatalf("WatchAlarms: %v", err)
	}
	waitFor(t, "the stuck watch to be registered", func() bool { return hub.Watchers() == idle+1 })
	withStuck := run(batches)
	waitFor(t, "the stuck watcher to be dropped", func() bool { return hub.Watchers() == idle })
	after := r.srv.Store().Transitions()
	published := 0
	for k := range after {
		for l := range after[k] {
			published += int(after[k][l] - before[k][l])
		}
	}
	last := run(batches)

	// Reading now, the stuck client gets what the server had sent before
	// it gave up, then RESOURCE_EXHAUSTED.
	got := 0
	var end error
	for range published + 1 {
		if _, end = stuck.Recv(); end != nil {
			break
		}
		got++
	}
	without := (first.all.perSecond() + last.all.perSecond()) / 2
	ratio := withStuck.all.perSecond() / without
	t.Logf("ingest, batches of %d samples, each sample an alarm transition: without a watcher %.0f samples/s (%d batches before, %.0f; %d after, %.0f)",
		nUnits*perUnit, without, batches, first.all.perSecond(), batches, last.all.perSecond())
	t.Logf("with the stuck watcher: %.0f samples/s over %d batches (ratio %.2f); %.0f samples/s over the %d batches before it was dropped",
		withStuck.all.perSecond(), batches, ratio, withStuck.watched.perSecond(), withStuck.watched.batches)
	t.Logf("stuck watcher: %d transitions published while its phase ran; it read %d events the server had sent, then %v",
		published, got, status.Code(end))
	if status.Code(end) != codes.ResourceExhausted {
		t.Errorf("the stuck watch ended with %v, want RESOURCE_EXHAUSTED", end)
	}
	if got == 0 || got >= published {
		t.Errorf("the stuck client read %d events before the end, want some but fewer than the %d published", got, published)
	}
	if published <= rpc.DefaultWatchBuffer {
		t.Errorf("only %d transitions published; not enough to overflow the %d-event buffer", published, rpc.DefaultWatchBuffer)
	}
	// Nothing of the ended watch is left running on the server.
	deadline := time.Now().Add(waitLong)
	for {
		left := goroutinesIn("rpc.(*Alarms).WatchAlarms")
		if left == "" {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("goroutines of the ended watch still running after %s:\n%s", waitLong, left)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// goroutinesIn returns the stacks of the goroutines with fn in them.
func goroutinesIn(fn string) string {
	buf := make([]byte, 1<<20)
	buf = buf[:runtime.Stack(buf, true)]
	var out []string
	for _, g := range strings.Split(string(buf), "\n\n") {
		if strings.Contains(g, fn) {
			out = append(out, g)
		}
	}
	return strings.Join(out, "\n\n")
}

// rate adds up samples and the time they took.
type rate struct {
	samples, batches int
	took             time.Duration
}

func (r *rate) add(n int, d time.Duration) {
	r.samples, r.batches, r.took = r.samples+n, r.batches+1, r.took+d
}

func (r *rate) perSecond() float64 {
	if r.took <= 0 {
		return 0
	}
	return float64(r.samples) / r.took.Seconds()
}
