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
	"sync/atomic"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

// MaxInterval is the longest allowed time between two writes: after a
// kill -9 at most this much is lost.
const MaxInterval = 5 * time.Second

// Write stores sn in path atomically, sealed with its checksum.
func Write(path string, sn *ingest.Snapshot) error {
	data, err := sn.MarshalSealed()
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
	if sn.Format != "genvelope-state" || sn.Version < 1 || sn.Version > ingest.SnapshotVersion {
		return nil, fmt.Errorf("state file %s has format %q version %d; this genvelope reads %q versions 1 to %d",
			path, sn.Format, sn.Version, "genvelope-state", ingest.SnapshotVersion)
	}
	if err := sn.Verify(); err != nil {
		return nil, fmt.Errorf("state file %s: %w", path, err)
	}
	return &sn, nil
}

// MoveAside renames path to path.bad-TIME (TIME to the nanosecond),
// adding -2, -3, ... when that name is taken, so that a moved-aside file
// never replaces another. The durable log's checkpoint uses it too.
func MoveAside(path string, now time.Time) (string, error) {
	base := fmt.Sprintf("%s.bad-%s", path, now.UTC().Format("20060102T150405.000000000Z"))
	for i := 1; i < 1000; i++ {
		aside := base
		if i > 1 {
			aside = fmt.Sprintf("%s-%d", base, i)
		}
		// A hard link fails when the name exists: no file is ever
		// replaced. Then the original name is removed.
		if err := os.Link(path, aside); err != nil {
			if errors.Is(err, fs.ErrExist) {
				continue
			}
			return "", err
		}
		return aside, os.Remove(path)
	}
	return "", fmt.Errorf("state: no free name to move %s aside", path)
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
		aside, rerr := MoveAside(path, now)
		if rerr != nil {
			return fmt.Errorf("%v; and it could not be moved aside: %w", err, rerr)
		}
		log.Error("STATE FILE UNUSABLE: moved aside; starting clean — thermal memory, alarm acknowledgements and shelves are lost",
			"err", err, "moved_to", aside)
		return nil
	}
	restored, unknown, bad := store.Restore(sn)
	for _, b := range bad {
		log.Error("STATE ENTRY UNUSABLE: not restored; this unit starts clean (the other units are restored)", "state", path, "err", b)
	}
	log.Info("state restored", "state", path, "written", sn.Written, "units", restored, "not_in_fleet", len(unknown), "unusable", len(bad))
	return nil
}

// DegradedAfter is how many saves in a row may fail before the service
// reports itself degraded (/readyz).
const DegradedAfter = 3

// Saver writes the store's state to a file and counts the failures.
type Saver struct {
	path   string
	store  *ingest.Store
	log    *slog.Logger
	failed atomic.Uint64 // saves that failed since the start
	inRow  atomic.Uint64 // failures since the last success
}

// NewSaver returns a saver of store's state to path.
func NewSaver(path string, store *ingest.Store, log *slog.Logger) *Saver {
	return &Saver{path: path, store: store, log: log}
}

// Save writes the state once, counting a failure.
func (s *Saver) Save(now time.Time) error {
	if err := Write(s.path, s.store.Snapshot(now)); err != nil {
		s.failed.Add(1)
		n := s.inRow.Add(1)
		s.log.Error("state not saved", "err", err, "failures_in_a_row", n)
		return err
	}
	s.inRow.Store(0)
	return nil
}

// Failures returns the saves that failed since the start and the
// failures in a row since the last success.
func (s *Saver) Failures() (total, inRow uint64) { return s.failed.Load(), s.inRow.Load() }

// Degraded reports whether DegradedAfter or more saves in a row failed,
// with a sentence saying so.
func (s *Saver) Degraded() (string, bool) {
	if n := s.inRow.Load(); n >= DegradedAfter {
		return fmt.Sprintf("state file %s not saved %d times in a row: thermal memory and alarm state would be lost at a restart", s.path, n), true
	}
	return "", false
}

// Run saves every interval (at most MaxInterval) until ctx is done; the
// caller saves the final state at shutdown.
func (s *Saver) Run(ctx context.Context, interval time.Duration) {
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
			_ = s.Save(now) // logged and counted
		}
	}
}
