package durable

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/journal"
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

// exampleFleet loads deploy/examples/fleet.yaml.
func exampleFleet(t *testing.T) *fleet.Fleet {
	t.Helper()
	fl, ds, err := fleet.Load("../../deploy/examples/fleet.yaml")
	if err != nil || ds.HasErrors() {
		t.Fatal(err, ds)
	}
	return fl
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
	fl := exampleFleet(t)
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

// TestJournalBehindCheckpoint: a journal that has fewer entries from the
// log than the checkpoint says it had (lost in a power loss, or the file
// replaced) is reported loudly at start.
func TestJournalBehindCheckpoint(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server")
	}
	dir := t.TempDir()
	url := testenv.StartNATS(t, dir)
	fl := exampleFleet(t)
	// A stream of 10 messages, so that the journals' positions are in it.
	dl := openLog(t, Config{URLs: []string{url}, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	for range 10 {
		if _, err := dl.js.Publish(context.Background(), "genvelope.ops", []byte(`{}`)); err != nil {
			t.Fatal(err)
		}
	}
	for _, tc := range []struct {
		name          string
		journalAt     [2]uint64 // the journal's log position
		checkpointAt  [2]uint64 // the one the checkpoint recorded
		wantBehindLog bool
	}{
		{"no journal entries yet", [2]uint64{0, 0}, [2]uint64{0, 0}, false},
		{"journal as the checkpoint says", [2]uint64{7, 2}, [2]uint64{7, 2}, false},
		{"journal ahead (written after the checkpoint)", [2]uint64{9, 1}, [2]uint64{7, 2}, false},
		{"journal lost the last entry of a message", [2]uint64{7, 1}, [2]uint64{7, 2}, true},
		{"journal lost whole messages", [2]uint64{5, 3}, [2]uint64{7, 2}, true},
		{"journal file replaced", [2]uint64{0, 0}, [2]uint64{7, 2}, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			sub := t.TempDir()
			j, err := journal.Open(filepath.Join(sub, "journal.jsonl"), journal.Options{})
			if err != nil {
				t.Fatal(err)
			}
			defer j.Close()
			for n := range tc.journalAt[1] {
				if err := j.Append(journal.Entry{Change: journal.ChangeLevel, Message: fmt.Sprint("entry ", n), LogSeq: tc.journalAt[0]}); err != nil {
					t.Fatal(err)
				}
			}
			path := filepath.Join(sub, "checkpoint.json")
			cp := fmt.Sprintf(`{"format": "genvelope-log-state", "version": 1, "stream": "GENVELOPE", "prefix": "genvelope", "partitions": 8, "serves": "0-7",
				"stream_sequence": 0, "journal_log_sequence": %d, "journal_log_entries": %d, "state": {"format": "genvelope-state", "version": 2, "units": {}}}`,
				tc.checkpointAt[0], tc.checkpointAt[1])
			if err := os.WriteFile(path, []byte(cp), 0o600); err != nil {
				t.Fatal(err)
			}
			var logs strings.Builder
			dl := openLog(t, Config{URLs: []string{url}, CheckpointPath: path, Logger: slog.New(slog.NewTextHandler(&logs, nil))})
			if err := dl.Attach(context.Background(), ingest.NewStore(fl, ingest.Options{Journal: j}), nil); err != nil {
				t.Fatal(err)
			}
			if !strings.Contains(logs.String(), "checkpoint restored") {
				t.Fatalf("the checkpoint was not restored: %s", logs.String())
			}
			if got := strings.Contains(logs.String(), "JOURNAL BEHIND THE CHECKPOINT"); got != tc.wantBehindLog {
				t.Errorf("journal behind reported: %v, want %v; log:\n%s", got, tc.wantBehindLog, logs.String())
			}
		})
	}
}
