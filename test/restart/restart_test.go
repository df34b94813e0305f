package restart

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"math"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/state"
)

// waitLong bounds every wait: generous, since nothing here is about speed.
const waitLong = 60 * time.Second

// exampleFleet is the fleet file the service ships as its example.
const exampleFleet = "../../deploy/examples/fleet.yaml"

var (
	binDir   string // where the binary is built, removed after the tests
	buildBin sync.Once
	bin      string
	buildErr error
)

func TestMain(m *testing.M) {
	flag.Parse()
	code := m.Run()
	if binDir != "" {
		os.RemoveAll(binDir)
	}
	os.Exit(code)
}

// genvelope builds ./cmd/genvelope once and returns its path.
func genvelope(t *testing.T) string {
	t.Helper()
	buildBin.Do(func() {
		if binDir, buildErr = os.MkdirTemp("", "genvelope-restart-"); buildErr != nil {
			return
		}
		bin = filepath.Join(binDir, "genvelope")
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
		defer cancel()
		cmd := exec.CommandContext(ctx, "go", "build", "-o", bin, "./cmd/genvelope")
		cmd.Dir = filepath.Join("..", "..")
		if out, err := cmd.CombinedOutput(); err != nil {
			buildErr = fmt.Errorf("go build ./cmd/genvelope: %v\n%s", err, out)
		}
	})
	if buildErr != nil {
		t.Fatal(buildErr)
	}
	return bin
}

// output collects a program's output for the test to search.
type output struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (o *output) Write(p []byte) (int, error) {
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.buf.Write(p)
}

func (o *output) String() string {
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.buf.String()
}

// service is one genvelope serve process on loopback port-0 listeners.
type service struct {
	cmd  *exec.Cmd
	out  *output
	done chan struct{}
	err  error // set before done is closed

	conn  *grpc.ClientConn
	tel   pb.TelemetryServiceClient
	fleet pb.FleetServiceClient
	http  string // http://host:port
}

// serving finds the addresses in the log line the service writes once
// it listens.
var serving = regexp.MustCompile(`msg="genvelope serving".* grpc=(127\.0\.0\.1:\d+).* http=(127\.0\.0\.1:\d+)`)

// serve starts genvelope serve on fleetPath and statePath and waits until
// it is ready. It is stopped (SIGTERM, then SIGKILL) when the test ends.
func serve(t *testing.T, fleetPath, statePath string) *service {
	t.Helper()
	s := &service{out: &output{}, done: make(chan struct{})}
	s.cmd = exec.Command(genvelope(t), "serve", "--fleet", fleetPath, "--state", statePath, "--journal", filepath.Join(filepath.Dir(statePath), "journal.jsonl"),
		"--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0")
	s.cmd.Stdout, s.cmd.Stderr = s.out, s.out
	if err := s.cmd.Start(); err != nil {
		t.Fatalf("start genvelope: %v", err)
	}
	go func() { s.err = s.cmd.Wait(); close(s.done) }()
	t.Cleanup(func() {
		if s.conn != nil {
			s.conn.Close()
		}
		if !s.exited() {
			_ = s.cmd.Process.Signal(syscall.SIGTERM)
			select {
			case <-s.done:
			case <-time.After(waitLong):
				_ = s.cmd.Process.Kill()
				<-s.done
			}
		}
		if t.Failed() {
			t.Logf("genvelope (pid %d) output:\n%s", s.cmd.Process.Pid, s.out.String())
		}
	})
	deadline := time.Now().Add(waitLong)
	var m []string
	for m = serving.FindStringSubmatch(s.out.String()); m == nil; m = serving.FindStringSubmatch(s.out.String()) {
		if s.exited() || time.Now().After(deadline) {
			t.Fatalf("genvelope did not start serving (exited %v: %v); output:\n%s", s.exited(), s.err, s.out.String())
		}
		time.Sleep(20 * time.Millisecond)
	}
	s.http = "http://" + m[2]
	for {
		resp, err := http.Get(s.http + "/readyz")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				break
			}
		}
		if s.exited() || time.Now().After(deadline) {
			t.Fatalf("genvelope not ready: %v; output:\n%s", err, s.out.String())
		}
		time.Sleep(20 * time.Millisecond)
	}
	conn, err := grpc.NewClient(m[1], grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	s.conn, s.tel, s.fleet = conn, pb.NewTelemetryServiceClient(conn), pb.NewFleetServiceClient(conn)
	return s
}

func (s *service) exited() bool {
	select {
	case <-s.done:
		return true
	default:
		return false
	}
}

// kill sends SIGKILL and waits for the process to be gone.
func (s *service) kill(t *testing.T) {
	t.Helper()
	if err := s.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatalf("SIGKILL: %v", err)
	}
	select {
	case <-s.done:
	case <-time.After(waitLong):
		t.Fatalf("genvelope still running %s after SIGKILL", waitLong)
	}
	s.conn.Close()
	s.conn = nil
}

func (s *service) push(t *testing.T, samples ...*pb.Sample) *pb.PushResponse {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	resp, err := s.tel.Push(ctx, &pb.PushRequest{Samples: samples})
	if err != nil {
		t.Fatalf("Push: %v", err)
	}
	return resp
}

func (s *service) unit(t *testing.T, id string) *pb.GetUnitResponse {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	resp, err := s.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: id})
	if err != nil {
		t.Fatalf("GetUnit %s: %v", id, err)
	}
	return resp
}

// larchwater-2 of the example fleet: no coolant table, so rated_a is its
// continuous field rating; 146 % of it for 30 s is the field's
// short-time limit (IEEE C50.13, from memory: field 146 % for 30 s).
const (
	unit        = "larchwater-2"
	ratedFieldA = 1320.0
	overload    = 1.46
)

func overloaded(at time.Time) *pb.Sample {
	f := overload * ratedFieldA
	return &pb.Sample{UnitId: unit, Time: timestamppb.New(at), PMw: 80, QMvar: 10, VKv: 13.8, FieldA: &f}
}

// waitSnapshot waits for a state file whose unit id holds the sample at
// last (it is written every 5 s) and returns the unit's part of it.
func waitSnapshot(t *testing.T, statePath, id string, last time.Time) ingest.UnitSnapshot {
	t.Helper()
	pushed := time.Now()
	deadline := pushed.Add(waitLong)
	for {
		if sn, err := state.Read(statePath); err == nil {
			if ts := sn.Units[id].Times; len(ts) > 0 && ts[len(ts)-1] == last.UnixNano() {
				t.Logf("snapshot with the last sample written %s after the push", time.Since(pushed).Round(10*time.Millisecond))
				return sn.Units[id]
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("no state file with the sample at %s within %s", last, waitLong)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// A kill -9 in the middle of a field overload does not give the winding
// back its short-time capability: after a restart on the same state
// file the thermal accumulator is where the last snapshot left it (the
// file is written every 5 s, so at most that much is lost; nothing is
// pushed between the snapshot and the kill, so here nothing is), the
// samples from before the kill are duplicates, and the limit is reached
// at 30 s ± 1 s of overload in total (IEEE C50.13, from memory: field
// 146 % for 30 s), not 30 s after the restart. When the samples stop,
// the service assumes the overload goes on until the stale-telemetry
// warning threshold (2 s here): the winding holds 22 s of overload when
// the unit turns stale.
func TestKillDuringFieldOverload(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped under -short")
	}
	dir := t.TempDir()
	statePath := filepath.Join(dir, "state.json")
	example, err := os.ReadFile(exampleFleet)
	if err != nil {
		t.Fatal(err)
	}
	fleetPath := filepath.Join(dir, "fleet.yaml")
	if err := os.WriteFile(fleetPath, append([]byte("alarms:\n  limits:\n    stale_telemetry: {warning: 2, critical: 120}\n"), example...), 0o644); err != nil {
		t.Fatal(err)
	}
	const heldS = 20 + 2 // the pushed overload and the 2 s carried on by the wall clock
	s1 := serve(t, fleetPath, statePath)
	t0 := time.Now().Add(-10 * time.Minute).Truncate(time.Second)
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Second) }
	var batch []*pb.Sample
	for i := -1; i <= 20; i++ { // the sample at -1 s confirms the overload (a first sample is suspect)
		batch = append(batch, overloaded(at(i)))
	}
	if resp := s1.push(t, batch...); resp.Accepted != 22 {
		t.Fatalf("pushing 20 s of overload: %v", resp)
	}
	// Wait for a snapshot that holds the last sample and the unit gone
	// stale (written every 5 s).
	pushed := time.Now()
	want := heldS * (overload*overload - 1) / limits.FieldK
	var written float64
	deadline := pushed.Add(waitLong)
	for {
		if sn, err := state.Read(statePath); err == nil {
			if ts := sn.Units[unit].Times; len(ts) > 0 && ts[len(ts)-1] == at(20).UnixNano() && math.Abs(sn.Units[unit].FieldH/limits.FieldK-want) < 1e-9 {
				written = sn.Units[unit].FieldH / limits.FieldK
				break
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("no state file with the sample at 20 s and %g used within %s", want, waitLong)
		}
		time.Sleep(50 * time.Millisecond)
	}
	t.Logf("snapshot with the last sample written %s after the push", time.Since(pushed).Round(10*time.Millisecond))
	a := s1.unit(t, unit).FieldThermalUsedRatio
	if a != written || a < want*(1-1e-9) || a > want*(1+1e-9) {
		t.Fatalf("field_thermal_used_ratio %g before the kill, %g in the state file; want both %g (%d s at 146 %%)", a, written, want, heldS)
	}
	s1.kill(t)

	s2 := serve(t, fleetPath, statePath)
	if !strings.Contains(s2.out.String(), "state restored") {
		t.Errorf("no \"state restored\" in the restarted service's log")
	}
	g := s2.unit(t, unit)
	if g.FieldThermalUsedRatio != a {
		t.Errorf("field_thermal_used_ratio %g after kill -9 and restart, want %g as before it", g.FieldThermalUsedRatio, a)
	}
	if got := g.GetLatest().GetTime().AsTime(); !got.Equal(at(20)) {
		t.Errorf("latest sample after the restart at %s, want %s", got, at(20))
	}
	// The whole overload so far, resent: 22 samples, within the 256 recent
	// times a snapshot keeps of each unit.
	if resp := s2.push(t, batch...); resp.Duplicates != 22 || resp.Accepted != 0 || len(resp.Rejected) != 0 {
		t.Errorf("resending the 22 samples from before the kill: %v, want 22 duplicates", resp)
	}
	if g := s2.unit(t, unit); g.FieldThermalUsedRatio != a {
		t.Errorf("field_thermal_used_ratio %g after the resend, want %g: duplicates must not heat", g.FieldThermalUsedRatio, a)
	}
	reached := -1
	for i := 21; i <= 40 && reached < 0; i++ {
		if resp := s2.push(t, overloaded(at(i))); resp.Accepted != 1 {
			t.Fatalf("sample at %d s: %v", i, resp)
		}
		if s2.unit(t, unit).FieldThermalUsedRatio >= 1 {
			reached = i
		}
	}
	t.Logf("field_thermal_used_ratio %.4f at the kill; limit reached at %d s of overload in total", a, reached)
	if reached < 29 || reached > 31 {
		t.Errorf("limit reached at %d s of overload, want 30 s ± 1 s counting the 20 s before the kill", reached)
	}
}

// A state file that cannot be read does not keep the service down: it
// starts clean, says STATE FILE UNUSABLE, moves the file aside to
// path.bad-TIME (keeping it for a post-mortem), serves, and writes a
// good state file again.
func TestUnusableStateFile(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped under -short")
	}
	for _, tc := range []struct{ name, content string }{
		{"garbage", "\x00\x01 not a state file"},
		{"truncated", `{"format":"genvelope-state","version":1,"written":"2026-`},
		{"another version", `{"format":"genvelope-state","version":99,"units":{}}`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			statePath := filepath.Join(t.TempDir(), "state.json")
			if err := os.WriteFile(statePath, []byte(tc.content), 0o600); err != nil {
				t.Fatal(err)
			}
			s := serve(t, exampleFleet, statePath)
			if !strings.Contains(s.out.String(), "STATE FILE UNUSABLE") {
				t.Errorf("no STATE FILE UNUSABLE in the log")
			}
			aside, _ := filepath.Glob(statePath + ".bad-*")
			if len(aside) != 1 {
				t.Fatalf("moved-aside files %v, want one %s.bad-*", aside, statePath)
			}
			if b, err := os.ReadFile(aside[0]); err != nil || string(b) != tc.content {
				t.Errorf("%s: %q, %v; want the unusable file's content", aside[0], b, err)
			}
			at := time.Now().Add(-time.Minute)
			if resp := s.push(t, overloaded(at)); resp.Accepted != 1 {
				t.Fatalf("push after starting clean: %v", resp)
			}
			if g := s.unit(t, unit); g.FieldThermalUsedRatio != 0 || !g.GetLatest().GetTime().AsTime().Equal(at) {
				t.Errorf("GetUnit after starting clean: used %g, latest %v", g.FieldThermalUsedRatio, g.GetLatest().GetTime())
			}
			deadline := time.Now().Add(waitLong)
			for {
				sn, err := state.Read(statePath)
				if err == nil && len(sn.Units[unit].Times) == 1 {
					break
				}
				if time.Now().After(deadline) {
					t.Fatalf("no good state file within %s: %v", waitLong, err)
				}
				time.Sleep(50 * time.Millisecond)
			}
		})
	}
}
