package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/server"
)

// replayServer runs a server over the example fleet on loopback until the
// test ends, and returns its gRPC address.
func replayServer(t *testing.T) *server.Server {
	t.Helper()
	srv, err := server.New(server.Config{FleetPath: example, GRPCListen: "127.0.0.1:0", HTTPListen: "127.0.0.1:0",
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- srv.Run(ctx) }()
	t.Cleanup(func() {
		cancel()
		select {
		case <-done:
		case <-time.After(60 * time.Second):
			t.Errorf("server did not stop within 60 s")
		}
	})
	return srv
}

func csvFile(t *testing.T, lines ...string) string {
	t.Helper()
	path := filepath.Join(t.TempDir(), "rows.csv")
	if err := os.WriteFile(path, []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

func TestReplayCommand(t *testing.T) {
	srv := replayServer(t)
	addr := srv.GRPCAddr()
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	at := func(s int) string { return t0.Add(time.Duration(s) * time.Second).UTC().Format(time.RFC3339) }
	good := csvFile(t, "time,unit,p_mw,q_mvar,v_kv",
		at(0)+",harrowmere-1,300,100,20.2",
		at(0)+",larchwater-2,80,10,13.8",
		at(1)+",harrowmere-1,301,101,20.2")
	mixed := csvFile(t, "time,unit,p_mw,q_mvar,v_kv",
		at(5)+",harrowmere-1,300,100,20.2",
		at(5)+",nowhere-9,300,100,20.2",
		at(6)+",harrowmere-1,x,100,20.2")
	badHeader := csvFile(t, "time,unit,p_mw,q_mvar,v_kv,rpm")

	tests := []struct {
		name           string
		args           []string
		code           int
		stdout, stderr []string
	}{
		{"all accepted", []string{"replay", "--target", addr, "--file", good}, 0,
			[]string{good + ": 3 rows: 3 accepted, 0 duplicate, 0 rejected, 0 not readable"}, nil},
		{"again: all duplicates", []string{"replay", "--target", addr, "--file", good, "--batch", "1", "--speed", "1000"}, 0,
			[]string{"3 rows: 0 accepted, 3 duplicate"}, nil},
		{"rejected and unreadable rows", []string{"replay", "--target", addr, "--file", mixed}, 1,
			[]string{"3 rows: 1 accepted, 0 duplicate, 1 rejected, 1 not readable", mixed + `:3: unit "nowhere-9": unknown_unit:`,
				mixed + `:4: p_mw: "x" is not a number`}, nil},
		{"no target", []string{"replay", "--file", good}, 2, nil, []string{"missing --target ADDR"}},
		{"no file", []string{"replay", "--target", addr}, 2, nil, []string{"missing --file FILE"}},
		{"missing file", []string{"replay", "--target", addr, "--file", "absent.csv"}, 2, nil, []string{"absent.csv: no such file"}},
		{"bad header", []string{"replay", "--target", addr, "--file", badHeader}, 2, nil, []string{badHeader + `:1: unknown column(s) "rpm"`}},
		{"batch too large", []string{"replay", "--target", addr, "--file", good, "--batch", "1000"}, 2, nil, []string{"--batch 1000: must be 1 to 256"}},
		{"negative speed", []string{"replay", "--target", addr, "--file", good, "--speed", "-1"}, 2, nil, []string{"--speed -1"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			code, stdout, stderr := runCLI(tc.args...)
			if code != tc.code {
				t.Errorf("exit %d, want %d\nstdout:\n%s\nstderr:\n%s", code, tc.code, stdout, stderr)
			}
			for _, w := range tc.stdout {
				if !strings.Contains(stdout, w) {
					t.Errorf("stdout does not say %q:\n%s", w, stdout)
				}
			}
			for _, w := range tc.stderr {
				if !strings.Contains(stderr, w) {
					t.Errorf("stderr does not say %q:\n%s", w, stderr)
				}
			}
		})
	}
}

// Plain progress lines when stderr is not a terminal.
func TestReplayProgressLines(t *testing.T) {
	srv := replayServer(t)
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	lines := []string{"time,unit,p_mw,q_mvar,v_kv"}
	for i := range 40 {
		lines = append(lines, fmt.Sprintf("%s,larchwater-2,80,10,13.8", t0.Add(time.Duration(i)*time.Second).UTC().Format(time.RFC3339)))
	}
	path := csvFile(t, lines...)
	var stdout, stderr lockedBuffer
	// 40 recorded seconds at 100 times their pace: 0.4 s, with a line
	// every 50 ms.
	code := runReplay(context.Background(), env{stdout: &stdout, stderr: &stderr},
		replayOptions{target: srv.GRPCAddr(), file: path, speed: 100, batch: 10, progressEvery: 50 * time.Millisecond})
	if code != exitOK {
		t.Fatalf("exit %d\n%s\n%s", code, stdout.String(), stderr.String())
	}
	if !strings.Contains(stderr.String(), "replay: ") || !strings.Contains(stderr.String(), "rows read") {
		t.Errorf("no progress lines on stderr:\n%s", stderr.String())
	}
	if strings.Contains(stderr.String(), "\r") {
		t.Errorf("a bar drawn on a stream that is not a terminal:\n%q", stderr.String())
	}
	if !strings.Contains(stdout.String(), "40 rows: 40 accepted") {
		t.Errorf("summary:\n%s", stdout.String())
	}
}
