package durable

import (
	"context"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"slices"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/test/testenv"
)

// openLog opens a log, waiting for the server to take connections.
func openLog(t *testing.T, cfg Config) *Log {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		dl, err := Open(context.Background(), cfg)
		if err == nil {
			t.Cleanup(dl.Close)
			return dl
		}
		if time.Now().After(deadline) {
			t.Fatal(err)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestUnusableCheckpointMovedAside: a checkpoint that cannot be used
// (corrupt, of another format, of another stream) is moved aside, and
// each one keeps its own name: three in a row leave three files with
// their own contents, none overwritten, and the replica starts from the
// log.
func TestUnusableCheckpointMovedAside(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server")
	}
	dir := t.TempDir()
	url := testenv.StartNATS(t, dir)
	fl, ds, err := fleet.Load("../../deploy/examples/fleet.yaml")
	if err != nil || ds.HasErrors() {
		t.Fatal(err, ds)
	}
	path := filepath.Join(dir, "checkpoint.json")
	bad := []string{
		`{"format": "genvelope-log-state", "version": 1, "stream_sequence": 3, "sta`,
		`{"format": "genvelope-log-state", "version": 99, "state": {}}`,
		`{"format": "genvelope-log-state", "version": 1, "stream": "OTHER", "prefix": "genvelope", "partitions": 8, "serves": "0-7", "state": {"format": "genvelope-state", "version": 2, "units": {}}}`,
	}
	for _, content := range bad {
		if err := os.WriteFile(path, []byte(content), 0o600); err != nil {
			t.Fatal(err)
		}
		dl := openLog(t, Config{URLs: []string{url}, CheckpointPath: path, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
		if err := dl.Attach(context.Background(), ingest.NewStore(fl, ingest.Options{}), nil); err != nil {
			t.Fatalf("attach with an unusable checkpoint: %v", err)
		}
		if dl.Applied() != 0 {
			t.Errorf("starts at sequence %d, want the whole log", dl.Applied())
		}
		if _, err := os.Stat(path); !os.IsNotExist(err) {
			t.Errorf("the unusable checkpoint was left in place: %v", err)
		}
		dl.Close()
	}
	aside, _ := filepath.Glob(path + ".bad-*")
	var got []string
	for _, a := range aside {
		b, err := os.ReadFile(a)
		if err != nil {
			t.Fatal(err)
		}
		got = append(got, string(b))
	}
	slices.Sort(got)
	want := slices.Clone(bad)
	slices.Sort(want)
	if !slices.Equal(got, want) {
		t.Errorf("moved aside %d files %v with contents\n%q\nwant each unusable checkpoint once:\n%q", len(aside), aside, got, want)
	}
}
