package durable

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/state"
)

// The checkpoint (version 2: a JSON line, then the binary state) reads
// back as written, a version 1 checkpoint (one JSON object) is still
// read, and a changed byte in the state makes the file unusable.
func TestCheckpointVersions(t *testing.T) {
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	store := ingest.NewStore(fl, ingest.Options{Now: func() time.Time { return at }})
	for i := range 300 {
		smp := ingest.Sample{UnitID: "harrowmere-1", Time: at.Add(time.Duration(i-300) * time.Second), PMW: 200, QMvar: 50, VKV: 20}
		if r, d := store.Accept(at, &smp); r != ingest.Accepted {
			t.Fatalf("%v %s", r, d)
		}
	}
	dir := t.TempDir()
	l := &Log{cfg: Config{Stream: "s", Prefix: "p", Partitions: 2, CheckpointPath: filepath.Join(dir, "v2")},
		serves: []bool{true, false}, store: store, seq: 7, ledger: map[string]*Ledger{"harrowmere-1": {Count: 300, Digest: 5}}}
	if err := l.writeCheckpoint(); err != nil {
		t.Fatal(err)
	}
	v1 := Checkpoint{Format: checkpointFormat, Version: 1, Stream: "s", Prefix: "p", Partitions: 2, Serves: "0", Sequence: 7,
		Ledger: l.ledger, State: store.Snapshot(at)}
	v1.State.Version = ingest.SnapshotVersion
	data, err := json.Marshal(v1)
	if err != nil {
		t.Fatal(err)
	}
	if err := state.WriteFile(filepath.Join(dir, "v1"), data); err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{"v1", "v2"} {
		cp, err := ReadCheckpoint(filepath.Join(dir, name))
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		us := cp.State.Units["harrowmere-1"]
		if cp.Stream != "s" || cp.Serves != "0" || cp.Sequence != 7 || cp.Ledger["harrowmere-1"].Count != 300 ||
			len(us.Times) != 256 || us.Times[255] != at.Add(-time.Second).UnixNano() || us.Latest == nil {
			t.Errorf("%s: read back %+v, times %d", name, cp, len(us.Times))
		}
	}
	b, err := os.ReadFile(filepath.Join(dir, "v2"))
	if err != nil {
		t.Fatal(err)
	}
	b[len(b)-100] ^= 1
	if err := os.WriteFile(filepath.Join(dir, "bad"), b, 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := ReadCheckpoint(filepath.Join(dir, "bad")); err == nil || !strings.Contains(err.Error(), "corrupt") {
		t.Errorf("a changed byte: %v, want corrupt", err)
	}
}
