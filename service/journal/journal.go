// Package journal is the alarm journal: an append-only record of every
// alarm transition, acknowledgement, shelve, unshelve, fleet reload and
// operator change to a unit's thermal memory, with the time, the unit,
// the limit, the levels, the quantity, the operator's sentence and who
// acted.
//
// The journal is a file of JSON lines. Each entry is written with one
// write(2) as it is appended, so a process killed at any moment keeps
// every entry appended before (the kernel holds the written bytes);
// Sync (after every operator action, and about once a second by Run)
// makes them durable against a power loss too. The file is bounded: past
// MaxBytes it is rotated to FILE.1 (FILE.1 to FILE.2, ...) and the oldest
// beyond Keep is removed. A line torn by a crash is skipped on reading.
package journal

import (
	"bufio"
	"bytes"
	"context"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"
)

// The changes an entry records.
const (
	ChangeLevel        = "level"         // an alarm's level rose or fell
	ChangeAcknowledged = "acknowledged"  // an operator acknowledged an alarm
	ChangeShelved      = "shelved"       // an operator shelved an alarm
	ChangeUnshelved    = "unshelved"     // a shelf was lifted or expired
	ChangeReload       = "reload"        // the fleet file was loaded again
	ChangeRemoved      = "removed"       // a reload removed the unit: its alarm ended
	ChangeReset        = "reset"         // an operator cleared a unit's thermal accumulators
	ChangeDiscard      = "discard"       // an operator discarded one sample's thermal effect
	ChangeDenied       = "access_denied" // access control refused a call (service/access)
)

// Changes lists every change, for filters.
func Changes() []string {
	return []string{ChangeLevel, ChangeAcknowledged, ChangeShelved, ChangeUnshelved, ChangeReload, ChangeRemoved, ChangeReset, ChangeDiscard, ChangeDenied}
}

// Levels are the alarm levels, lowest first, as entries name them.
var levels = []string{"normal", "warning", "critical"}

// Entry is one journal record. Numbers that do not exist are absent.
type Entry struct {
	Seq       uint64    `json:"seq"`            // increasing, from 1; the order of the journal
	Recorded  time.Time `json:"recorded"`       // wall clock when written
	Time      time.Time `json:"time"`           // when it happened: sample time for level changes, else the wall clock
	Unit      string    `json:"unit,omitempty"` // empty for a fleet-wide entry (reload)
	Site      string    `json:"site,omitempty"`
	Limit     string    `json:"limit,omitempty"` // the alarm (alarm kind name), or the winding for a reset
	Change    string    `json:"change"`
	Level     string    `json:"level,omitempty"`
	Prev      string    `json:"previous_level,omitempty"`
	Value     *float64  `json:"value,omitempty"` // the quantity held against the thresholds (a margin, a fraction used, seconds)
	Threshold *float64  `json:"threshold,omitempty"`
	Actual    *float64  `json:"actual,omitempty"` // what the alarm watches, in Units
	LimitAt   *float64  `json:"limit_value,omitempty"`
	Units     string    `json:"units,omitempty"`
	Message   string    `json:"message"`
	Operator  string    `json:"operator,omitempty"`
	// LogSeq is, with serve --nats, the stream sequence of the log
	// message whose application made this entry (0 for an entry of this
	// process alone, such as a refused call). Every replica writes the
	// same entries for the same message; see Append for how a replica
	// that replays the log after a restart skips those it has.
	LogSeq uint64 `json:"log_seq,omitempty"`
}

// Num returns a pointer to x, or nil when x is NaN or infinite (JSON
// has no such numbers).
func Num(x float64) *float64 {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return nil
	}
	return &x
}

// Options tune a journal. The zero value takes the defaults.
type Options struct {
	MaxBytes int64            // size at which the file is rotated; default 8 MiB
	Keep     int              // rotated files kept; default 4 (at most 40 MiB with the defaults)
	Now      func() time.Time // default time.Now
	Logger   *slog.Logger
}

// Journal is an open journal. It is safe for concurrent use.
type Journal struct {
	path string
	opts Options

	mu     sync.Mutex
	f      *os.File
	size   int64
	seq    uint64
	dirty  bool
	failed uint64 // appends that could not be written
	buf    bytes.Buffer

	// The log position (Entry.LogSeq): the last log sequence written
	// and how many entries it made; the sequence being appended now and
	// how many entries it has made so far.
	logSeq, logN uint64
	curSeq, curN uint64
	replayed     uint64 // entries skipped because the journal had them
}

// Open opens (or creates) the journal at path and continues its
// sequence.
func Open(path string, o Options) (*Journal, error) {
	if o.MaxBytes <= 0 {
		o.MaxBytes = 8 << 20
	}
	if o.Keep <= 0 {
		o.Keep = 4
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Logger == nil {
		o.Logger = slog.Default()
	}
	j := &Journal{path: path, opts: o}
	for i := 0; i <= o.Keep && j.seq == 0; i++ {
		last, err := lastSeq(j.file(i))
		if err != nil {
			return nil, err
		}
		j.seq = last
	}
	// The log position: the last entry from the log, in the newest file
	// that has one, read after the file before it (a message's entries
	// may straddle a rotation).
	for i := 0; i <= o.Keep && j.logSeq == 0; i++ {
		if err := j.readLogPosition(i); err != nil {
			return nil, err
		}
		if j.logSeq != 0 && i < o.Keep {
			j.logSeq, j.logN = 0, 0
			for _, k := range []int{i + 1, i} { // oldest first
				if err := j.readLogPosition(k); err != nil {
					return nil, err
				}
			}
		}
	}
	if err := j.openFile(); err != nil {
		return nil, err
	}
	return j, nil
}

// readLogPosition reads file i, in order, into the journal's log
// position: the LogSeq of the last entry from the log, and how many
// entries that message made (counting on from the file read before).
func (j *Journal) readLogPosition(i int) error {
	return scan(j.file(i), func(e *Entry) bool {
		switch {
		case e.LogSeq == 0:
		case e.LogSeq == j.logSeq:
			j.logN++
		default:
			j.logSeq, j.logN = e.LogSeq, 1
		}
		return true
	})
}

// LogPosition returns the last log sequence the journal has entries
// from (0 when none) and how many entries that message made.
func (j *Journal) LogPosition() (seq, entries uint64) {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.logSeq, j.logN
}

// ForgetLogPosition makes the journal write every entry from the log
// again, whatever its sequence: for a journal whose entries came from
// another stream (the log is new: its sequences start again).
func (j *Journal) ForgetLogPosition() {
	j.mu.Lock()
	defer j.mu.Unlock()
	j.logSeq, j.logN, j.curSeq, j.curN = 0, 0, 0, 0
}

// Replayed returns the number of entries from the log that were not
// written again because the journal had them.
func (j *Journal) Replayed() uint64 {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.replayed
}

// file returns the name of the i-th file: 0 the one written, 1 the
// newest rotated one.
func (j *Journal) file(i int) string {
	if i == 0 {
		return j.path
	}
	return j.path + "." + strconv.Itoa(i)
}

func (j *Journal) openFile() error {
	f, err := os.OpenFile(j.path, os.O_RDWR|os.O_CREATE|os.O_APPEND, 0o644)
	if err != nil {
		return fmt.Errorf("journal: %w", err)
	}
	st, err := f.Stat()
	if err != nil {
		f.Close()
		return fmt.Errorf("journal: %w", err)
	}
	j.f, j.size = f, st.Size()
	// A crash may have torn the last line: end it, so that the next
	// entry starts on a line of its own.
	if j.size > 0 {
		b := make([]byte, 1)
		if _, err := f.ReadAt(b, j.size-1); err == nil && b[0] != '\n' {
			n, _ := f.Write([]byte("\n"))
			j.size += int64(n)
		}
	}
	return nil
}

// lastSeq returns the highest sequence number in file name, 0 when it
// has none or does not exist.
func lastSeq(name string) (uint64, error) {
	var last uint64
	err := scan(name, func(e *Entry) bool {
		last = max(last, e.Seq)
		return true
	})
	return last, err
}

// scan calls fn for each readable entry of file name in order until fn
// returns false. A missing file has no entries.
func scan(name string, fn func(*Entry) bool) error {
	f, err := os.Open(name)
	if errors.Is(err, os.ErrNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("journal: %w", err)
	}
	defer f.Close()
	r := bufio.NewReaderSize(f, 64<<10)
	for {
		line, err := r.ReadBytes('\n')
		if len(line) > 0 {
			var e Entry
			if json.Unmarshal(line, &e) == nil && e.Seq > 0 {
				if !fn(&e) {
					return nil
				}
			}
		}
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return fmt.Errorf("journal: reading %s: %w", name, err)
		}
	}
}

// Append records e, giving it the next sequence number and the time it
// is recorded. It never blocks on the disk beyond one write; a failure
// is counted (Failed), logged and returned.
//
// An entry from the log (LogSeq not 0) that the journal already has is
// not written again: a replica restarted from its checkpoint applies the
// log again from the checkpoint's sequence, which the journal, written
// as each message is applied, is at or beyond. Messages are applied one
// at a time, in sequence order, and applying one gives the same entries
// in the same order on every replica and at every replay; so the n-th
// entry of message s is already in the journal when s is below the
// journal's last LogSeq, or equal to it and n is at most the number of
// entries the journal has from it.
func (j *Journal) Append(e Entry) error {
	j.mu.Lock()
	defer j.mu.Unlock()
	if e.LogSeq != 0 {
		if e.LogSeq != j.curSeq {
			j.curSeq, j.curN = e.LogSeq, 0
		}
		j.curN++
		if e.LogSeq < j.logSeq || e.LogSeq == j.logSeq && j.curN <= j.logN {
			j.replayed++
			return nil
		}
	}
	if j.f == nil {
		j.failed++
		return errors.New("journal: closed")
	}
	e.Seq = j.seq + 1
	e.Recorded = j.opts.Now().UTC()
	if e.Time.IsZero() {
		e.Time = e.Recorded
	}
	e.Time = e.Time.UTC()
	j.buf.Reset()
	if err := json.NewEncoder(&j.buf).Encode(&e); err != nil { // ends in a newline
		j.failed++
		return fmt.Errorf("journal: encoding: %w", err)
	}
	if j.size > 0 && j.size+int64(j.buf.Len()) > j.opts.MaxBytes {
		if err := j.rotate(); err != nil {
			j.failed++
			j.opts.Logger.Error("journal not rotated", "err", err)
		}
	}
	n, err := j.f.Write(j.buf.Bytes())
	j.size += int64(n)
	if err != nil {
		j.failed++
		j.opts.Logger.Error("JOURNAL ENTRY NOT WRITTEN", "err", err, "entry", e.Message)
		return fmt.Errorf("journal: %w", err)
	}
	j.seq = e.Seq
	j.dirty = true
	if e.LogSeq != 0 {
		j.logSeq, j.logN = e.LogSeq, j.curN
	}
	return nil
}

// rotate moves the files one place down and starts a new one. j.mu must
// be held.
func (j *Journal) rotate() error {
	_ = j.f.Sync()
	if err := j.f.Close(); err != nil {
		return err
	}
	j.f = nil
	_ = os.Remove(j.file(j.opts.Keep))
	for i := j.opts.Keep - 1; i >= 0; i-- {
		if err := os.Rename(j.file(i), j.file(i+1)); err != nil && !errors.Is(err, os.ErrNotExist) {
			return err
		}
	}
	return j.openFile()
}

// Sync makes every entry appended so far durable.
func (j *Journal) Sync() error {
	j.mu.Lock()
	defer j.mu.Unlock()
	if j.f == nil || !j.dirty {
		return nil
	}
	if err := j.f.Sync(); err != nil {
		return fmt.Errorf("journal: %w", err)
	}
	j.dirty = false
	return nil
}

// Failed returns the number of entries that could not be written.
func (j *Journal) Failed() uint64 {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.failed
}

// Run syncs the journal about once a second until ctx is done.
func (j *Journal) Run(ctx context.Context) {
	t := time.NewTicker(time.Second)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
			if err := j.Sync(); err != nil {
				j.opts.Logger.Error("journal not synced", "err", err)
			}
		}
	}
}

// Close syncs and closes the journal.
func (j *Journal) Close() error {
	j.mu.Lock()
	defer j.mu.Unlock()
	if j.f == nil {
		return nil
	}
	err := j.f.Sync()
	if cerr := j.f.Close(); err == nil {
		err = cerr
	}
	j.f = nil
	return err
}

// Filter selects entries. Empty fields select everything.
type Filter struct {
	Units    []string
	Limits   []string
	Changes  []string
	MinLevel string    // "", "normal", "warning" or "critical": entries whose level or previous level is at least this
	Since    time.Time // Time at or after
	Until    time.Time // Time before
	Operator string    // entries by this operator
}

// ErrBadFilter and ErrBadToken are returned by Query for a filter or a
// page token it cannot use.
var (
	ErrBadFilter = errors.New("bad journal filter")
	ErrBadToken  = errors.New("bad page token")
)

// Check returns an error wrapping ErrBadFilter that says what is wrong
// with f, or nil.
func (f *Filter) Check() error {
	for _, c := range f.Changes {
		if !slices.Contains(Changes(), c) {
			return fmt.Errorf("%w: change %q is not one of %s", ErrBadFilter, c, strings.Join(Changes(), ", "))
		}
	}
	if f.MinLevel != "" && !slices.Contains(levels, f.MinLevel) {
		return fmt.Errorf("%w: min_level %q is not one of %s", ErrBadFilter, f.MinLevel, strings.Join(levels, ", "))
	}
	if !f.Since.IsZero() && !f.Until.IsZero() && !f.Since.Before(f.Until) {
		return fmt.Errorf("%w: since %s is not before until %s", ErrBadFilter, f.Since.Format(time.RFC3339), f.Until.Format(time.RFC3339))
	}
	return nil
}

func (f *Filter) match(e *Entry) bool {
	switch {
	case len(f.Units) > 0 && !slices.Contains(f.Units, e.Unit),
		len(f.Limits) > 0 && !slices.Contains(f.Limits, e.Limit),
		len(f.Changes) > 0 && !slices.Contains(f.Changes, e.Change),
		!f.Since.IsZero() && e.Time.Before(f.Since),
		!f.Until.IsZero() && !e.Time.Before(f.Until),
		f.Operator != "" && e.Operator != f.Operator:
		return false
	}
	if f.MinLevel != "" {
		minL := slices.Index(levels, f.MinLevel)
		if slices.Index(levels, e.Level) < minL && slices.Index(levels, e.Prev) < minL {
			return false
		}
	}
	return true
}

// MaxPage is the largest page Query returns.
const MaxPage = 1000

// Query returns up to size entries that match f, newest first, starting
// after the page token (empty for the first page), and the token of the
// next page ("" when there is none). size 0 means 100.
func (j *Journal) Query(f Filter, size int, token string) ([]Entry, string, error) {
	if err := f.Check(); err != nil {
		return nil, "", err
	}
	if size < 0 || size > MaxPage {
		return nil, "", fmt.Errorf("%w: page size %d is outside 0 to %d", ErrBadFilter, size, MaxPage)
	}
	if size == 0 {
		size = 100
	}
	before := uint64(math.MaxUint64)
	if token != "" {
		b, err := parseToken(token)
		if err != nil {
			return nil, "", err
		}
		before = b
	}
	out, more, err := j.query(&f, size, before)
	if err != nil {
		return nil, "", err
	}
	next := ""
	if more {
		next = makeToken(out[len(out)-1].Seq)
	}
	return out, next, nil
}

// Matching returns up to limit entries that match f, newest first, in
// one pass over the files (for a download); more reports whether there
// were others.
func (j *Journal) Matching(f Filter, limit int) (entries []Entry, more bool, err error) {
	if err := f.Check(); err != nil {
		return nil, false, err
	}
	return j.query(&f, limit, math.MaxUint64)
}

// query collects up to size matching entries older than before.
func (j *Journal) query(f *Filter, size int, before uint64) ([]Entry, bool, error) {
	j.mu.Lock()
	keep := j.opts.Keep
	j.mu.Unlock()
	var out []Entry
	more := false
	// Newest file first; within a file entries are in order, so collect
	// the file's matches and take them from the end.
	for i := 0; i <= keep && !more; i++ {
		var in []Entry
		err := scan(j.file(i), func(e *Entry) bool {
			if e.Seq < before && f.match(e) {
				in = append(in, *e)
			}
			return true
		})
		if err != nil {
			return nil, false, err
		}
		for k := len(in) - 1; k >= 0; k-- {
			if len(out) == size {
				more = true
				break
			}
			out = append(out, in[k])
		}
	}
	return out, more, nil
}

func makeToken(seq uint64) string {
	return base64.RawURLEncoding.EncodeToString([]byte("j1:" + strconv.FormatUint(seq, 10)))
}

func parseToken(tok string) (uint64, error) {
	b, err := base64.RawURLEncoding.DecodeString(tok)
	if err != nil || !strings.HasPrefix(string(b), "j1:") {
		return 0, fmt.Errorf("%w: %q is not a token this service issued", ErrBadToken, tok)
	}
	seq, err := strconv.ParseUint(string(b[3:]), 10, 64)
	if err != nil || seq == 0 {
		return 0, fmt.Errorf("%w: %q is not a token this service issued", ErrBadToken, tok)
	}
	return seq, nil
}
