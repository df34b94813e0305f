package demo

import (
	"bufio"
	"context"
	"io"
	"log/slog"
	"net/http"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// waitLong bounds every wait: generous, since nothing is asserted about
// speed, only that things happen.
const waitLong = 60 * time.Second

// startDemo runs a demo on loopback ports until the test ends, and
// returns it with a client connection to it.
func startDemo(t *testing.T, cfg Config) (*Demo, *grpc.ClientConn) {
	t.Helper()
	cfg.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	d, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	conn, err := grpc.NewClient(d.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		cancel()
		<-done
		t.Fatal(err)
	}
	t.Cleanup(func() {
		conn.Close()
		cancel()
		select {
		case err := <-done:
			if err != nil {
				t.Errorf("demo Run: %v", err)
			}
		case <-time.After(waitLong):
			t.Errorf("the demo did not stop within %s", waitLong)
		}
	})
	return d, conn
}

// The demo comes up, every unit gets an evaluation and margin metrics,
// nothing the simulator sends is rejected, and it stops cleanly.
func TestDemoEveryUnitReports(t *testing.T) {
	t.Parallel()
	d, conn := startDemo(t, Config{})
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	fc := pb.NewFleetServiceClient(conn)
	ids := d.Fleet().IDs()
	for _, id := range ids {
		for {
			resp, err := fc.GetUnit(ctx, &pb.GetUnitRequest{UnitId: id})
			if err == nil && resp.Evaluation != nil && len(resp.Evaluation.Margins) > 0 {
				break
			}
			if ctx.Err() != nil {
				t.Fatalf("%s has no evaluation within %s (last error %v)", id, waitLong, err)
			}
			time.Sleep(100 * time.Millisecond)
		}
	}

	req, err := http.NewRequestWithContext(ctx, http.MethodGet, "http://"+d.HTTPAddr()+"/metrics", nil)
	if err != nil {
		t.Fatal(err)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	seen := map[string]bool{}
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		line := sc.Text()
		if !strings.HasPrefix(line, "genvelope_limit_margin_ratio{") {
			continue
		}
		for _, id := range ids {
			if strings.Contains(line, `unit="`+id+`"`) {
				seen[id] = true
			}
		}
	}
	for _, id := range ids {
		if !seen[id] {
			t.Errorf("/metrics has no genvelope_limit_margin_ratio for %s", id)
		}
	}
	// The server applies a batch before the simulator has read its
	// acknowledgement: wait (bounded) for the simulator's own count.
	st := d.Stats()
	for deadline := time.Now().Add(30 * time.Second); st.Accepted == 0 && time.Now().Before(deadline); st = d.Stats() {
		time.Sleep(20 * time.Millisecond)
	}
	if st.Rejected > 0 || st.Accepted == 0 {
		t.Errorf("simulator: %+v; want samples accepted and none rejected", st)
	}
}

// With the script sped up and started just before the drift, the
// drifting hydro unit raises its underexcited alarm, seen by a watcher
// over AlarmService.
func TestDemoDriftAlarm(t *testing.T) {
	t.Parallel()
	fl, err := Fleet()
	if err != nil {
		t.Fatal(err)
	}
	sc, err := NewScenario(fl, DefaultDay)
	if err != nil {
		t.Fatal(err)
	}
	drift, ok := sc.Episode(EpisodeDrift)
	if !ok {
		t.Fatal("no drift episode")
	}
	_, conn := startDemo(t, Config{Speed: 6, StartAt: drift.From + 0.05})
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	w, err := pb.NewAlarmServiceClient(conn).WatchAlarms(ctx, &pb.WatchAlarmsRequest{Filter: &pb.AlarmFilter{
		UnitIds: []string{drift.Unit}, MinLevel: pb.AlarmLevel_ALARM_LEVEL_WARNING}})
	if err != nil {
		t.Fatal(err)
	}
	for {
		resp, err := w.Recv()
		if err != nil {
			t.Fatalf("no underexcited alarm of %s within %s: %v", drift.Unit, waitLong, err)
		}
		ev := resp.Event
		if ev.Change == pb.AlarmChange_ALARM_CHANGE_LEVEL && ev.Level >= pb.AlarmLevel_ALARM_LEVEL_WARNING &&
			slices.Contains(drift.Alarms, ev.Limit) {
			t.Logf("%s %s %s: %s", ev.UnitId, ev.Limit, ev.Level, ev.Message)
			return
		}
	}
}
