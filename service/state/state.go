// Package state keeps the service's durable state in a file: the
// thermal accumulators, alarm states, acknowledgements, shelves and each
// unit's recent timestamps (ingest.Snapshot). The file is replaced
// atomically (a temporary file, fsync, rename, fsync of the directory),
// so a crash at any moment leaves either the old file or the new one.
package state

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"log/slog"
	"os"
	"path/filepath"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

// MaxInterval is the longest allowed time between two writes: after a
// kill -9 at most this much is lost.
const MaxInterval = 5 * time.Second

// Write stores sn in path atomically.
func Write(path string, sn *ingest.Snapshot) error {
	data, err := json.Marshal(sn)
	if err != nil {
		return fmt.Errorf("state: encoding: %w", err)
	}
	return WriteFile(path, data)
}

// WriteFile replaces path with data atomically: a crash at any moment
// leaves either the old file or the new one.
func WriteFile(path string, data []byte) error {
	dir := filepath.Dir(path)
	f, err := os.CreateTemp(dir, "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return fmt.Errorf("state: %w", err)
	}
	tmp := f.Name()
	defer os.Remove(tmp) // after a successful rename there is nothing to remove
	if _, err := f.Write(data); err != nil {
		f.Close()
		return fmt.Errorf("state: writing %s: %w", tmp, err)
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return fmt.Errorf("state: syncing %s: %w", tmp, err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("state: closing %s: %w", tmp, err)
	}
	if err := os.Rename(tmp, path); err != nil {
		return fmt.Errorf("state: %w", err)
	}
	if d, err := os.Open(dir); err == nil {
		_ = d.Sync() // make the rename durable; some file systems cannot, which is not an error
		d.Close()
	}
	return nil
}

// ErrNoState is returned by Read when there is no state file yet.
var ErrNoState = errors.New("no state file")

// Read loads the snapshot in path. It returns ErrNoState when the file
// does not exist, and an error saying what is wrong when the file cannot
// be used (corrupt, or written by an incompatible version).
func Read(path string) (*ingest.Snapshot, error) {
	data, err := os.ReadFile(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, ErrNoState
	}
	if err != nil {
		return nil, fmt.Errorf("state: %w", err)
	}
	var sn ingest.Snapshot
	if err := json.Unmarshal(data, &sn); err != nil {
		return nil, fmt.Errorf("state file %s is corrupt: %w", path, err)
	}
	if sn.Format != "genvelope-state" || sn.Version != ingest.SnapshotVersion {
		return nil, fmt.Errorf("state file %s has format %q version %d; this genvelope reads %q version %d",
			path, sn.Format, sn.Version, "genvelope-state", ingest.SnapshotVersion)
	}
	return &sn, nil
}

// Load restores path into store at start. A corrupt or incompatible file
// is moved aside (to path.bad-TIME) with a loud log line, and the store
// starts clean; only a file that exists but cannot be read or moved is
// an error.
func Load(path string, store *ingest.Store, log *slog.Logger, now time.Time) error {
	sn, err := Read(path)
	switch {
	case errors.Is(err, ErrNoState):
		log.Info("no state file yet; starting with cold windings and no alarms", "state", path)
		return nil
	case err != nil:
		aside := fmt.Sprintf("%s.bad-%s", path, now.UTC().Format("20060102T150405Z"))
		if rerr := os.Rename(path, aside); rerr != nil {
			return fmt.Errorf("%v; and it could not be moved aside: %w", err, rerr)
		}
		log.Error("STATE FILE UNUSABLE: moved aside; starting clean — thermal memory, alarm acknowledgements and shelves are lost",
			"err", err, "moved_to", aside)
		return nil
	}
	restored, unknown := store.Restore(sn)
	log.Info("state restored", "state", path, "written", sn.Written, "units", restored, "not_in_fleet", len(unknown))
	return nil
}

// Keep writes the store's state to path every interval (at most
// MaxInterval) until ctx is done; the caller writes the final state at
// shutdown with Write. Failures are logged and retried at the next tick.
func Keep(ctx context.Context, path string, store *ingest.Store, interval time.Duration, log *slog.Logger) {
	if interval <= 0 || interval > MaxInterval {
		interval = MaxInterval
	}
	t := time.NewTicker(interval)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case now := <-t.C:
			if err := Write(path, store.Snapshot(now)); err != nil {
				log.Error("state not saved", "err", err)
			}
		}
	}
}
