package durable

import (
	"context"
	"io"
	"log/slog"
	"net/http"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testenv"
)

// TestJudgeLag: readiness from the lags, with hysteresis: not ready at
// once when either lag is over its bound; ready again only after both
// have stayed within half their bounds for the hold time.
func TestJudgeLag(t *testing.T) {
	cfg := Config{MaxLag: 4 * time.Second, MaxLagMessages: 100, LagHold: 2 * time.Second}.withDefaults()
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	type step struct {
		atS     float64
		msgs    uint64
		lagS    float64
		tooFar  bool
		comment string
	}
	for _, tc := range []struct {
		name  string
		steps []step
	}{
		{"messages over, then back", []step{
			{0, 10, 0, false, "within"},
			{1, 101, 0, true, "over the message bound"},
			{2, 60, 0, true, "under the bound but above half: still behind"},
			{3, 50, 0, true, "within half: the hold starts"},
			{4.9, 10, 0, true, "within half for 1.9 s"},
			{5, 0, 0, false, "within half for 2 s: ready"},
		}},
		{"seconds over, flapping near the bound", []step{
			{0, 0, 4.5, true, "over the lag bound"},
			{1, 0, 1, true, "within half"},
			{2, 0, 3, true, "above half: the hold starts again"},
			{3, 0, 1.5, true, "within half again"},
			{4.5, 0, 1.5, true, "1.5 s only"},
			{5, 0, 0, false, "2 s"},
			{6, 0, 3.9, false, "above half but within the bound: stays ready"},
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			l := &Log{cfg: cfg, log: slog.New(slog.NewTextHandler(io.Discard, nil))}
			l.caughtUp.Store(true)
			for _, s := range tc.steps {
				l.behind.Store(s.msgs)
				l.lagNS.Store(int64(s.lagS * 1e9))
				l.judgeLag(t0.Add(time.Duration(s.atS * 1e9)))
				if l.tooFar.Load() != s.tooFar {
					t.Errorf("at %g s (%d messages, %g s): too far %v, want %v (%s)", s.atS, s.msgs, s.lagS, l.tooFar.Load(), s.tooFar, s.comment)
				}
			}
		})
	}
}

// TestNotePoll: the lag in messages from a poll of the consumer is its
// messages not yet delivered plus those delivered and not applied; a
// poll with some and nothing applied since the last one is a stall, whose
// lag in seconds grows from the last message applied. After the ordered
// consumer was recreated (its sequence starts again from 1, below the
// one last applied), a message delivered beyond the stream sequence
// applied still counts.
func TestNotePoll(t *testing.T) {
	cfg := Config{MaxLag: 4 * time.Second, MaxLagMessages: 100, LagHold: 2 * time.Second}.withDefaults()
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	type poll struct {
		atS                                 float64
		pending, delivered, deliveredStream uint64
		wantMsgs                            uint64
		wantLagS                            float64
	}
	for _, tc := range []struct {
		name  string
		polls []poll
	}{
		{"caught up", []poll{{1, 0, 40, 120, 0, 0}, {2, 0, 40, 120, 0, 0}}},
		{"delivered, not applied", []poll{{1, 0, 43, 125, 3, 1}, {2, 5, 43, 125, 8, 2}}},
		{"consumer recreated, one delivered", []poll{{1, 0, 1, 121, 1, 1}, {3, 0, 1, 121, 1, 3}, {6, 0, 1, 121, 1, 6}}},
		{"consumer recreated, nothing delivered", []poll{{1, 2, 0, 0, 2, 1}, {2, 2, 0, 0, 2, 2}}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			// Applied: stream sequence 120, consumer sequence 40, at t0;
			// the poll before saw 120 applied too, so every poll with
			// messages waiting is a stall.
			l := &Log{cfg: cfg, log: slog.New(slog.NewTextHandler(io.Discard, nil))}
			l.caughtUp.Store(true)
			l.applied.Store(120)
			l.appliedAt, l.appliedCons, l.lastPollSeq = t0, 40, 120
			for _, p := range tc.polls {
				l.notePoll(t0.Add(time.Duration(p.atS*1e9)), p.pending, p.delivered, p.deliveredStream)
				if got, lag := l.behind.Load(), float64(l.lagNS.Load())/1e9; got != p.wantMsgs || lag != p.wantLagS {
					t.Errorf("at %g s: %d messages, %g s behind; want %d, %g s", p.atS, got, lag, p.wantMsgs, p.wantLagS)
				}
			}
		})
	}
}

// TestNotePollBeforeAnyApplied: a replica stalled before it has applied
// a single message (paused or stuck from its start) is behind in seconds
// too, from the first poll that finds it stalled, and so turns not ready.
func TestNotePollBeforeAnyApplied(t *testing.T) {
	cfg := Config{MaxLag: 4 * time.Second, MaxLagMessages: 100, LagHold: 2 * time.Second}.withDefaults()
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	l := &Log{cfg: cfg, log: slog.New(slog.NewTextHandler(io.Discard, nil))}
	l.caughtUp.Store(true) // the stream was empty at start
	for _, p := range []struct {
		atS      float64
		pending  uint64
		wantLagS float64
		tooFar   bool
	}{{1, 3, 0, false}, {3, 7, 2, false}, {6, 12, 5, true}} {
		l.notePoll(t0.Add(time.Duration(p.atS*1e9)), p.pending, 0, 0)
		if lag := float64(l.lagNS.Load()) / 1e9; lag != p.wantLagS || l.behind.Load() != p.pending || l.tooFar.Load() != p.tooFar {
			t.Errorf("at %g s: %d messages, %g s behind, too far %v; want %d, %g s, %v",
				p.atS, l.behind.Load(), lag, l.tooFar.Load(), p.pending, p.wantLagS, p.tooFar)
		}
	}
}

// TestReadinessFollowsLag runs two replicas in this process on a real
// nats-server; the first stops applying the log (its consumer paused:
// a replica starved or stuck) while the second takes telemetry. The
// first turns not ready, saying it is behind, its lag metric grows,
// and it is ready again once it has caught up; the second stays ready.
func TestReadinessFollowsLag(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server")
	}
	dir := t.TempDir()
	url := testenv.StartNATS(t, dir)
	log := slog.New(slog.NewTextHandler(io.Discard, nil))

	type replica struct {
		log  *Log
		srv  *server.Server
		done chan error
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	start := func(name string) *replica {
		dl := openLog(t, Config{URLs: []string{url}, CheckpointPath: filepath.Join(dir, name+".json"),
			MaxLag: time.Second, LagHold: 500 * time.Millisecond, Logger: log})
		srv, err := server.New(server.Config{FleetPath: "../../deploy/examples/fleet.yaml", GRPCListen: "127.0.0.1:0",
			HTTPListen: "127.0.0.1:0", Logger: log, Log: dl})
		if err != nil {
			t.Fatal(err)
		}
		r := &replica{log: dl, srv: srv, done: make(chan error, 1)}
		go func() { r.done <- srv.Run(ctx) }()
		return r
	}
	a, b := start("a"), start("b")
	readyz := func(r *replica) (int, string) {
		resp, err := http.Get("http://" + r.srv.HTTPAddr() + "/readyz")
		if err != nil {
			return 0, err.Error()
		}
		defer resp.Body.Close()
		body, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(body)
	}
	waitReady := func(r *replica) {
		t.Helper()
		deadline := time.Now().Add(testenv.WaitLong)
		for {
			if code, _ := readyz(r); code == http.StatusOK {
				return
			}
			if time.Now().After(deadline) {
				_, why := readyz(r)
				t.Fatalf("not ready: %s", why)
			}
			time.Sleep(20 * time.Millisecond)
		}
	}
	waitReady(a)
	waitReady(b)

	conn, err := grpc.NewClient(b.srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	tel := pb.NewTelemetryServiceClient(conn)
	base := time.Now().Add(-6 * time.Hour).Truncate(time.Second) // 5 s of sample time a push: far from the 5 s future limit however long the wait
	k := 0
	push := func() {
		t.Helper()
		pctx, pcancel := context.WithTimeout(ctx, testenv.WaitLong)
		defer pcancel()
		var req pb.PushRequest
		for range 5 {
			req.Samples = append(req.Samples, &pb.Sample{UnitId: "larchwater-2", Time: timestamppb.New(base.Add(time.Duration(k) * time.Second)),
				PMw: 80, QMvar: 20, VKv: 13.8})
			k++
		}
		if resp, err := tel.Push(pctx, &req); err != nil || resp.Accepted != 5 {
			t.Fatalf("push through the second replica: %v, %v", resp, err)
		}
	}
	push()

	a.log.pauseApply()
	sawBehind, maxLagS := "", 0.0
	deadline := time.Now().Add(testenv.WaitLong)
	for sawBehind == "" {
		push() // the second replica applies its own traffic: it stays ready
		if code, why := readyz(b); code != http.StatusOK {
			t.Fatalf("the replica taking traffic is not ready: %s", why)
		}
		if code, why := readyz(a); code == http.StatusServiceUnavailable && strings.Contains(why, "behind the log") {
			sawBehind = why
		}
		maxLagS = max(maxLagS, float64(a.log.lagNS.Load())/1e9)
		if time.Now().After(deadline) {
			t.Fatal("the paused replica never said it was behind the log")
		}
		time.Sleep(100 * time.Millisecond)
	}
	t.Logf("paused replica: %s", strings.TrimSpace(sawBehind))
	if maxLagS <= 1 {
		t.Errorf("lag %g s when not ready for being behind; want above the 1 s bound", maxLagS)
	}
	if a.log.tooFarGa == nil || !a.log.tooFar.Load() {
		t.Error("genvelope_log_behind is not 1")
	}

	a.log.resumeApply()
	waitReady(a)
	if a.log.Applied() < b.log.Applied()-1 || a.log.lagNS.Load() != 0 {
		t.Errorf("ready again at sequence %d (the other at %d), lag %d ns", a.log.Applied(), b.log.Applied(), a.log.lagNS.Load())
	}
	cancel()
	for _, r := range []*replica{a, b} {
		if err := <-r.done; err != nil {
			t.Fatal(err)
		}
	}
}
