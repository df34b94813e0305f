package server_test

import (
	"bytes"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"google.golang.org/protobuf/types/known/durationpb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/service/state"
)

// logBuffer is a log destination safe for the server's goroutines.
type logBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *logBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *logBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// An orderly stop writes the state, and a server started on it carries
// on as if it had not stopped: the field winding's thermal memory (a
// winding just overloaded must not come back cold: IEEE C50.13, from
// memory, gives its short-time capability once, not once per restart),
// the alarm's level, its acknowledgement and its shelf (ANSI/ISA-18.2,
// from memory: shelving and acknowledgement are operator records), and
// the recent timestamps that make a resent sample a duplicate.
func TestStateSurvivesOrderlyRestart(t *testing.T) {
	statePath := filepath.Join(t.TempDir(), "state.json")
	cfg := server.Config{StatePath: statePath, StateInterval: 200 * time.Millisecond}
	r := start(t, cfg)
	ctx := ctxT(t)
	ac := pb.NewAlarmServiceClient(r.conn)
	const unit = "larchwater-2"
	// 20 s at 146 % field current and a prime-mover margin of 0.03: the
	// prime_mover warning (5 s on-delay) and the field_thermal warning
	// (0.5 used at about 15 s) are raised.
	t0 := time.Now().Add(-10 * time.Minute).Truncate(time.Second)
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Second) }
	overload := func(i int) *pb.Sample {
		s := sample(unit, at(i), larchwaterP(0.03), 20, 13.8)
		s.FieldA = f64(1.46 * 1320)
		return s
	}
	var batch []*pb.Sample
	for i := range 21 {
		batch = append(batch, overload(i))
	}
	r.push(t, ctx, batch...)
	if _, err := ac.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: unit, Limit: "prime_mover", Operator: "tester"}); err != nil {
		t.Fatalf("AcknowledgeAlarm: %v", err)
	}
	sh, err := ac.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: unit, Limit: "field_thermal", Duration: durationpb.New(time.Hour), Operator: "tester"})
	if err != nil {
		t.Fatalf("ShelveAlarm: %v", err)
	}
	g1, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: unit})
	if err != nil {
		t.Fatal(err)
	}
	before := mustList(t, ac)
	if err := r.stop(t); err != nil {
		t.Fatalf("Run: %v", err)
	}
	sn, err := state.Read(statePath)
	if err != nil {
		t.Fatalf("the state written at stop: %v", err)
	}
	if us := sn.Units[unit]; us.FieldH/limits.FieldK != g1.FieldThermalUsedRatio {
		t.Errorf("state file field heating %g s (used %g), GetUnit said %g", us.FieldH, us.FieldH/limits.FieldK, g1.FieldThermalUsedRatio)
	}

	r2 := start(t, cfg)
	ac2 := pb.NewAlarmServiceClient(r2.conn)
	g2, err := r2.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: unit})
	if err != nil {
		t.Fatal(err)
	}
	if g2.FieldThermalUsedRatio != g1.FieldThermalUsedRatio || g2.FieldThermalUsedRatio == 0 {
		t.Errorf("field_thermal_used_ratio %g after the restart, %g before", g2.FieldThermalUsedRatio, g1.FieldThermalUsedRatio)
	}
	if !g2.GetLatest().GetTime().AsTime().Equal(at(20)) {
		t.Errorf("latest sample after the restart at %v, want the last one before it, %s", g2.GetLatest().GetTime().AsTime(), at(20))
	}
	after := mustList(t, ac2)
	for _, limit := range []string{"prime_mover", "field_thermal"} {
		a, b := find(before, unit, limit), find(after, unit, limit)
		if a == nil || b == nil {
			t.Errorf("%s alarm before the restart %v, after %v; want it active on both sides", limit, a, b)
			continue
		}
		if a.Level != b.Level || a.Acknowledged != b.Acknowledged || !a.Time.AsTime().Equal(b.Time.AsTime()) ||
			!a.GetShelvedUntil().AsTime().Equal(b.GetShelvedUntil().AsTime()) {
			t.Errorf("%s alarm changed over the restart:\n before %v\n after  %v", limit, a, b)
		}
	}
	if a := find(after, unit, "prime_mover"); a != nil && !a.Acknowledged {
		t.Error("the acknowledgement of prime_mover was lost over the restart")
	}
	if a := find(after, unit, "field_thermal"); a != nil && !a.GetShelvedUntil().AsTime().Equal(sh.ShelvedUntil.AsTime()) {
		t.Errorf("field_thermal shelved until %v after the restart, want %s", a.GetShelvedUntil().AsTime(), sh.ShelvedUntil.AsTime())
	}

	// Resent samples from before the stop are duplicates; the next one
	// heats on from where the winding was: one more second at 146 %.
	resp, err := r2.tel.Push(ctx, &pb.PushRequest{Samples: []*pb.Sample{overload(19), overload(20), overload(21)}})
	if err != nil || resp.Duplicates != 2 || resp.Accepted != 1 {
		t.Fatalf("resending 19 s and 20 s and sending 21 s after the restart: %v, %v; want 2 duplicates and 1 accepted", resp, err)
	}
	g3, err := r2.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: unit})
	if err != nil {
		t.Fatal(err)
	}
	want := g1.FieldThermalUsedRatio + (1.46*1.46-1)/limits.FieldK
	if !closeTo(g3.FieldThermalUsedRatio, want, 1e-9) {
		t.Errorf("field_thermal_used_ratio %g one second after the restart, want %g", g3.FieldThermalUsedRatio, want)
	}
}

// A state file that cannot be used does not stop the service: it is
// moved aside with a loud log line and the service starts clean.
func TestUnusableStateFile(t *testing.T) {
	for _, tc := range []struct{ name, content string }{
		{"not JSON", "this is not a state file\n"},
		{"empty", ""},
		{"another version", `{"format":"genvelope-state","version":99,"units":{}}`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			statePath := filepath.Join(dir, "state.json")
			writeFile(t, statePath, tc.content)
			var logs logBuffer
			r := start(t, server.Config{StatePath: statePath, Logger: slog.New(slog.NewTextHandler(&logs, nil))})
			if !strings.Contains(logs.String(), "STATE FILE UNUSABLE") {
				t.Errorf("no STATE FILE UNUSABLE in the log:\n%s", logs.String())
			}
			aside, _ := filepath.Glob(statePath + ".bad-*")
			if len(aside) != 1 {
				t.Fatalf("moved-aside files %v, want one %s.bad-*", aside, statePath)
			}
			if got := readFile(t, aside[0]); got != tc.content {
				t.Errorf("%s holds %q, want the unusable file's content %q", aside[0], got, tc.content)
			}
			if _, err := os.Stat(statePath); err == nil {
				if _, rerr := state.Read(statePath); rerr != nil {
					t.Errorf("%s is still there and unusable: %v", statePath, rerr)
				}
			}
			ctx := ctxT(t)
			r.push(t, ctx, sample("larchwater-2", time.Now().Add(-time.Minute), 80, 10, 13.8))
			g, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: "larchwater-2"})
			if err != nil || g.Latest == nil || g.FieldThermalUsedRatio != 0 {
				t.Errorf("GetUnit after starting clean: %v, %v", g, err)
			}
		})
	}
}
