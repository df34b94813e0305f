package main

import (
	"bytes"
	"context"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/demo"
	"github.com/genvelope/genvelope/service/fleet"
)

// lockedBuffer is a buffer a command may write while a test reads it.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// genvelope demo on loopback ports: it prints where to look, the script
// and the caution, serves metrics, stops cleanly when its context ends,
// and leaves its state file behind.
func TestDemoCommand(t *testing.T) {
	var stdout, stderr lockedBuffer
	state := filepath.Join(t.TempDir(), "state.json")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan int, 1)
	go func() {
		done <- runDemo(ctx, env{stdout: &stdout, stderr: &stderr}, demoOptions{grpcListen: "127.0.0.1:0", httpListen: "127.0.0.1:0",
			speed: 1, day: demo.DefaultDay, statePath: state})
	}()
	deadline := time.Now().Add(60 * time.Second)
	for !strings.Contains(stdout.String(), "Stop with Ctrl-C") {
		if time.Now().After(deadline) {
			cancel()
			t.Fatalf("no start-up message within 60 s:\n%s\n%s", stdout.String(), stderr.String())
		}
		time.Sleep(20 * time.Millisecond)
	}
	out := stdout.String()
	for _, w := range []string{"8 invented units at 4 sites", "/units/ID", "/metrics", "gRPC", "One simulated day passes every 20m0s",
		"vessa-2: at light load", "quarrendon-1: its telemetry link", fleet.Caution} {
		if !strings.Contains(out, w) {
			t.Errorf("the demo does not say %q:\n%s", w, out)
		}
	}
	m := regexp.MustCompile(`metrics +(http://\S+/metrics)`).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("no metrics address in:\n%s", out)
	}
	resp, err := http.Get(m[1])
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK || !bytes.Contains(body, []byte("genvelope_samples_total")) {
		t.Errorf("GET %s: %s\n%.300s", m[1], resp.Status, body)
	}
	cancel()
	select {
	case code := <-done:
		if code != exitOK {
			t.Errorf("exit %d, want 0; stderr:\n%s", code, stderr.String())
		}
	case <-time.After(60 * time.Second):
		t.Fatal("the demo did not stop within 60 s of its context ending")
	}
	if _, err := os.Stat(state); err != nil {
		t.Errorf("state file: %v", err)
	}
}

func TestDemoUsage(t *testing.T) {
	tests := []struct {
		args []string
		want string
	}{
		{[]string{"demo", "--speed", "0"}, "--speed 0: must be above 0"},
		{[]string{"demo", "--speed", "NaN"}, "--speed NaN"},
		{[]string{"demo", "--day", "1m"}, "--day 1m0s: must be 10m0s to 24h0m0s"},
		{[]string{"demo", "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0", "extra"}, `unexpected argument "extra"`},
	}
	for _, tc := range tests {
		code, _, stderr := runCLI(tc.args...)
		if code != exitUsage || !strings.Contains(stderr, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want 2 and %q", tc.args, code, stderr, tc.want)
		}
	}
	code, stdout, _ := runCLI("help", "demo")
	if code != exitOK || !strings.Contains(stdout, "-speed") || !strings.Contains(stdout, fleet.Caution) {
		t.Errorf("help demo: exit %d\n%s", code, stdout)
	}
}
