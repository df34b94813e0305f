// Package state keeps the service's durable state in a file: the
// thermal accumulators, alarm states, acknowledgements, shelves and each
// unit's recent timestamps (ingest.Snapshot). The file is replaced
// atomically (a temporary file, fsync, rename, fsync of the directory),
// so a crash at any moment leaves either the old file or the new one.
package state

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
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

// Write stores sn in path atomically, in the binary state format with
// its checksum.
func Write(path string, sn *ingest.Snapshot) error {
	return WriteStream(path, sn.WriteBinary)
}

// WriteFile replaces path with data atomically: a crash at any moment
// leaves either the old file or the new one.
func WriteFile(path string, data []byte) error {
	return WriteStream(path, func(w io.Writer) error {
		_, err := w.Write(data)
		return err
	})
}

// WriteStream replaces path atomically with what encode writes: a
// crash at any moment leaves either the old file or the new one. encode
// writes straight to the temporary file (no copy of the whole content is
// made in memory).
func WriteStream(path string, encode func(io.Writer) error) error {
	dir := filepath.Dir(path)
	f, err := os.CreateTemp(dir, "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return fmt.Errorf("state: %w", err)
	}
	tmp := f.Name()
	defer os.Remove(tmp) // after a successful rename there is nothing to remove
	if err := encode(f); err != nil {
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

// Read loads the snapshot in path, in either format: the binary one
// the service writes, or the JSON of versions 1 and 2 that earlier
// releases wrote. It returns ErrNoState when the file does not exist,
// and an error saying what is wrong when the file cannot be used
// (corrupt, or written by an incompatible version). Entries of a binary
// file that do not decode are in the snapshot's Bad.
func Read(path string) (*ingest.Snapshot, error) {
	f, err := os.Open(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, ErrNoState
	}
	if err != nil {
		return nil, fmt.Errorf("state: %w", err)
	}
	defer f.Close()
	br := bufio.NewReader(f)
	if head, _ := br.Peek(len(ingest.StateMagic)); !ingest.IsBinaryState(head) {
		return readJSON(path, br)
	}
	sn, err := ingest.ReadSnapshot(br)
	if err != nil {
		return nil, fmt.Errorf("state file %s: %w", path, err)
	}
	return sn, nil
}

// readJSON reads a state file of versions 1 and 2 (JSON).
func readJSON(path string, r io.Reader) (*ingest.Snapshot, error) {
	var sn ingest.Snapshot
	if err := json.NewDecoder(r).Decode(&sn); err != nil {
		return nil, fmt.Errorf("state file %s is corrupt: %w", path, err)
	}
	if sn.Format != "genvelope-state" || sn.Version < 1 || sn.Version > ingest.SnapshotVersion {
		return nil, fmt.Errorf("state file %s has format %q version %d; this genvelope reads %q versions 1 to %d (JSON) and %d (binary)",
			path, sn.Format, sn.Version, "genvelope-state", ingest.SnapshotVersion, ingest.BinarySnapshotVersion)
	}
	if err := sn.Verify(); err != nil {
		return nil, fmt.Errorf("state file %s: %w", path, err)
	}
	return &sn, nil
}

// verify reads the binary state file at path to its end: framing and
// checksum. Nothing is restored from a file before it passed.
func verify(path string) error {
	_, err := decodeFile(path, func(string, *ingest.UnitSnapshot, error) {})
	return err
}

// decodeFile calls each with every entry of the binary state file at
// path (err is a *ingest.BadEntryError for an entry that did not
// decode; us is reused between calls) and returns what ends the file
// early, or nil at its good end, with the time the file was written.
func decodeFile(path string, each func(id string, us *ingest.UnitSnapshot, err error)) (written time.Time, err error) {
	f, err := os.Open(path)
	if err != nil {
		return written, fmt.Errorf("state: %w", err)
	}
	defer f.Close()
	d, err := ingest.NewStateDecoder(f)
	if err != nil {
		return written, fmt.Errorf("state file %s: %w", path, err)
	}
	written = d.Written
	var us ingest.UnitSnapshot
	for {
		id, err := d.Next(&us)
		var bad *ingest.BadEntryError
		switch {
		case errors.Is(err, io.EOF):
			return written, nil
		case errors.As(err, &bad):
			each(id, nil, bad)
		case err != nil:
			return written, fmt.Errorf("state file %s is corrupt: %w", path, err)
		default:
			each(id, &us, nil)
		}
	}
}

// isBinary reports whether the file at path begins as a binary state
// file.
func isBinary(path string) bool {
	f, err := os.Open(path)
	if err != nil {
		return false
	}
	defer f.Close()
	head := make([]byte, len(ingest.StateMagic))
	n, _ := io.ReadFull(f, head)
	return ingest.IsBinaryState(head[:n])
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
	if isBinary(path) {
		return loadBinary(path, store, log, now)
	}
	sn, err := Read(path)
	switch {
	case errors.Is(err, ErrNoState):
		log.Info("no state file yet; starting with cold windings and no alarms", "state", path)
		return nil
	case err != nil:
		return unusable(path, err, log, now)
	}
	log.Info("state file in the JSON format of earlier releases: read; the next save writes the binary format", "state", path, "version", sn.Version)
	restored, unknown, bad := store.Restore(sn)
	logRestored(path, sn.Written, restored, len(unknown), bad, log)
	return nil
}

// loadBinary restores a binary state file unit by unit, once the whole
// file has passed its checksum: the state is never held whole in memory.
func loadBinary(path string, store *ingest.Store, log *slog.Logger, now time.Time) error {
	if err := verify(path); err != nil {
		return unusable(path, err, log, now)
	}
	var restored, unknown int
	var bad []error
	written, err := decodeFile(path, func(id string, us *ingest.UnitSnapshot, err error) {
		if err == nil {
			var known bool
			known, err = store.RestoreUnit(id, us)
			if !known {
				unknown++
				return
			}
		}
		if err != nil {
			bad = append(bad, err)
			return
		}
		restored++
	})
	if err != nil { // changed between the two reads
		return unusable(path, err, log, now)
	}
	logRestored(path, written, restored, unknown, bad, log)
	return nil
}

// unusable moves an unusable state file aside and says so loudly.
func unusable(path string, err error, log *slog.Logger, now time.Time) error {
	aside, rerr := MoveAside(path, now)
	if rerr != nil {
		return fmt.Errorf("%v; and it could not be moved aside: %w", err, rerr)
	}
	log.Error("STATE FILE UNUSABLE: moved aside; starting clean — thermal memory, alarm acknowledgements and shelves are lost",
		"err", err, "moved_to", aside)
	return nil
}

func logRestored(path string, written time.Time, restored, unknown int, bad []error, log *slog.Logger) {
	for _, b := range bad {
		log.Error("STATE ENTRY UNUSABLE: not restored; this unit starts clean (the other units are restored)", "state", path, "err", b)
	}
	log.Info("state restored", "state", path, "written", written, "units", restored, "not_in_fleet", unknown, "unusable", len(bad))
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
	err := WriteStream(s.path, func(w io.Writer) error { return s.store.EncodeState(w, now) })
	if err != nil {
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
