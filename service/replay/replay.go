package replay

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"slices"
	"sort"
	"strings"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/backoff"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// MaxBatch is the largest batch a replay sends. A batch is resent whole
// after a dropped connection, and the server remembers the last 256
// accepted times of each unit; a larger batch of one unit could come back
// as out of order instead of duplicate.
const MaxBatch = 256

// DefaultBatch is the batch size when Config.Batch is 0.
const DefaultBatch = 100

// Config is what a replay needs.
type Config struct {
	Target string // the server's gRPC address, host:port
	File   string // the CSV file

	// Speed replays at Speed times the pace of the recorded times; 0 as
	// fast as the server answers.
	Speed float64
	Batch int // rows per batch, 1 to MaxBatch; default DefaultBatch

	// Retries, Backoff and AckTimeout tune reconnection; see
	// SenderConfig.
	Retries    int
	Backoff    time.Duration
	AckTimeout time.Duration

	Logger *slog.Logger

	// Creds secure the connection (TLS, a client certificate); nil
	// connects in plaintext.
	Creds credentials.TransportCredentials
}

// Rejection is one row the server rejected.
type Rejection struct {
	Line   int
	Unit   string
	Reason string // the server's reason: unknown_unit, out_of_order, future, ...
	Detail string
}

// Summary accounts for every row of a replay, each once.
type Summary struct {
	File       string
	Rows       int // data rows read
	Accepted   int
	Duplicates int
	Rejected   []Rejection // in file order
	Bad        []RowError  // rows that could not be read, in file order; not sent
	Unanswered int         // rows read and sent (or about to be) with no answer when the replay stopped
	Complete   bool        // the whole file was read and every batch answered
	Reconnects int
	Resent     int // batches sent again after a dropped connection
}

// ByReason returns the number of rejected rows by reason.
func (s *Summary) ByReason() map[string]int {
	m := map[string]int{}
	for _, r := range s.Rejected {
		m[r.Reason]++
	}
	return m
}

// OK reports whether every row was read, sent and accepted or a
// duplicate.
func (s *Summary) OK() bool {
	return s.Complete && len(s.Rejected) == 0 && len(s.Bad) == 0 && s.Unanswered == 0
}

// Write prints the summary: one line of counts, then every rejected and
// every bad row with its file line.
func (s *Summary) Write(w io.Writer) {
	fmt.Fprintf(w, "%s: %d rows: %d accepted, %d duplicate, %d rejected, %d not readable",
		s.File, s.Rows, s.Accepted, s.Duplicates, len(s.Rejected), len(s.Bad))
	if s.Unanswered > 0 {
		fmt.Fprintf(w, ", %d sent without an answer", s.Unanswered)
	}
	if !s.Complete {
		fmt.Fprint(w, " (stopped before the end of the file)")
	}
	fmt.Fprintln(w)
	if s.Reconnects > 0 {
		fmt.Fprintf(w, "reconnected %d time(s), resent %d batch(es); a resent row already at the server counts as duplicate\n", s.Reconnects, s.Resent)
	}
	if len(s.Rejected) > 0 {
		by := s.ByReason()
		reasons := make([]string, 0, len(by))
		for r := range by {
			reasons = append(reasons, r)
		}
		sort.Strings(reasons)
		parts := make([]string, len(reasons))
		for i, r := range reasons {
			parts[i] = fmt.Sprintf("%d %s", by[r], r)
		}
		fmt.Fprintf(w, "rejected by the server (%s):\n", strings.Join(parts, ", "))
		if by["out_of_order"] > 0 {
			fmt.Fprintln(w, "  out_of_order: a row older than the newest sample the service already has for its unit (a live feed is ahead of this file, the file is not in time order for that unit, or it was replayed before); to evaluate recorded history without touching the live state, use genvelope replay --backfill")
		}
		if by["out_of_range_time"] > 0 {
			fmt.Fprintln(w, "  out_of_range_time: a row before the service's horizon (default 7 days) or outside 1678-2262; use genvelope replay --backfill for old history, and check the year")
		}
		for _, r := range s.Rejected {
			fmt.Fprintf(w, "  %s:%d: unit %q: %s: %s\n", s.File, r.Line, r.Unit, r.Reason, r.Detail)
		}
	}
	if len(s.Bad) > 0 {
		fmt.Fprintln(w, "not readable, not sent:")
		for _, b := range s.Bad {
			fmt.Fprintf(w, "  %s:%d: %s\n", s.File, b.Line, b.Reason)
		}
	}
}

// Progress is how far a replay has come.
type Progress struct {
	Rows     int     // data rows read
	Answered int     // rows answered by the server
	Fraction float64 // of the file's bytes read, 0 to 1
}

// Replayer replays one file.
type Replayer struct {
	cfg  Config
	f    *os.File
	size int64
	rd   *Reader

	mu       sync.Mutex
	progress Progress
}

// New opens the file and reads its header. A file that cannot be read or
// has a bad header is a *FileError; a bad configuration another error.
func New(cfg Config) (*Replayer, error) {
	switch {
	case cfg.Target == "":
		return nil, errors.New("no target address")
	case cfg.Batch < 0 || cfg.Batch > MaxBatch:
		return nil, fmt.Errorf("batch %d: must be 1 to %d (a batch is resent whole after a dropped connection, and the server remembers %d times per unit)", cfg.Batch, MaxBatch, MaxBatch)
	case cfg.Speed < 0:
		return nil, fmt.Errorf("speed %g: must be 0 (as fast as possible) or positive", cfg.Speed)
	}
	if cfg.Batch == 0 {
		cfg.Batch = DefaultBatch
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.DiscardHandler)
	}
	f, err := os.Open(cfg.File)
	if err != nil {
		return nil, &FileError{File: cfg.File, Msg: fileProblem(err)}
	}
	var size int64
	if fi, err := f.Stat(); err == nil {
		size = fi.Size()
	}
	rd, err := NewReader(cfg.File, f)
	if err != nil {
		f.Close()
		return nil, err
	}
	return &Replayer{cfg: cfg, f: f, size: size, rd: rd}, nil
}

func fileProblem(err error) string {
	if errors.Is(err, os.ErrNotExist) {
		return "no such file"
	}
	var pe *os.PathError
	if errors.As(err, &pe) {
		return pe.Err.Error()
	}
	return err.Error()
}

// Progress returns how far the replay has come. It is safe to call
// while Run runs.
func (r *Replayer) Progress() Progress {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.progress
}

// Run replays the file and closes it. The summary is never nil; the error
// says why the replay stopped early (ctx done, the connection lost for
// good, the file unreadable part way).
func (r *Replayer) Run(ctx context.Context) (*Summary, error) {
	defer r.f.Close()
	sum := &Summary{File: r.cfg.File}
	creds := r.cfg.Creds
	if creds == nil {
		creds = insecure.NewCredentials()
	}
	conn, err := grpc.NewClient(r.cfg.Target,
		grpc.WithTransportCredentials(creds),
		grpc.WithConnectParams(grpc.ConnectParams{
			Backoff:           backoff.Config{BaseDelay: 100 * time.Millisecond, Multiplier: 1.6, Jitter: 0.2, MaxDelay: 3 * time.Second},
			MinConnectTimeout: 5 * time.Second,
		}))
	if err != nil {
		return sum, fmt.Errorf("target %s: %w", r.cfg.Target, err)
	}
	defer conn.Close()
	window := max(1, min(4, MaxBatch/r.cfg.Batch))
	sender := NewSender(conn, SenderConfig{Window: window, Retries: r.cfg.Retries, Backoff: r.cfg.Backoff,
		AckTimeout: r.cfg.AckTimeout, Logger: r.cfg.Logger})

	src := &fileSource{r: r}
	answered := 0
	stats, err := sender.Run(ctx, src, func(b *Batch, resp *pb.PushResponse) {
		sum.Accepted += int(resp.Accepted)
		sum.Duplicates += int(resp.Duplicates)
		for _, rej := range resp.Rejected {
			i := int(rej.Index)
			sum.Rejected = append(sum.Rejected, Rejection{Line: b.Lines[i], Unit: b.Samples[i].UnitId,
				Reason: ReasonName(rej.Reason), Detail: rej.Detail})
		}
		answered += len(b.Samples)
		r.mu.Lock()
		r.progress.Answered = answered
		r.mu.Unlock()
	})
	sum.Rows = r.rd.Rows()
	sum.Bad = slices.Clone(r.rd.Bad())
	sum.Reconnects, sum.Resent = stats.Reconnects, stats.Resent
	sum.Unanswered = src.sent - answered
	sum.Complete = err == nil
	slices.SortStableFunc(sum.Rejected, func(a, b Rejection) int { return a.Line - b.Line })
	return sum, err
}

// ReasonName returns the name of a reject reason as the metrics spell it:
// "unknown_unit", "out_of_order", "future", ...; a reason this build does
// not know is "reason N".
func ReasonName(r pb.RejectReason) string {
	if _, ok := pb.RejectReason_name[int32(r)]; !ok {
		return fmt.Sprintf("reason %d", int32(r))
	}
	return strings.ToLower(strings.TrimPrefix(r.String(), "REJECT_REASON_"))
}

// fileSource turns the file's rows into batches, paced by their times
// when the replay has a speed.
type fileSource struct {
	r    *Replayer
	peek *Row // a row read and not yet batched
	eof  bool
	sent int // rows handed to the sender

	started bool
	fileT0  time.Time // the time of the first row
	wallT0  time.Time // when it was handed over
}

func (s *fileSource) Next(ctx context.Context) (*Batch, error) {
	r := s.r
	b := &Batch{}
	for len(b.Samples) < r.cfg.Batch {
		if s.peek == nil && !s.eof {
			row, ok, err := r.rd.Read()
			r.mu.Lock()
			r.progress.Rows = r.rd.Rows()
			if r.size > 0 {
				r.progress.Fraction = min(1, float64(r.rd.Offset())/float64(r.size))
			}
			r.mu.Unlock()
			if err != nil {
				return nil, err
			}
			if !ok {
				s.eof = true
			} else {
				s.peek = &row
			}
		}
		if s.peek == nil {
			break
		}
		if wait := s.wait(s.peek); wait > 0 {
			if len(b.Samples) > 0 {
				break // send what is due now; this row waits for its time
			}
			t := time.NewTimer(wait)
			select {
			case <-ctx.Done():
				t.Stop()
				return nil, ctx.Err()
			case <-t.C:
			}
		}
		b.Samples = append(b.Samples, s.peek.Sample)
		b.Lines = append(b.Lines, s.peek.Line)
		s.peek = nil
	}
	if len(b.Samples) == 0 {
		return nil, io.EOF
	}
	s.sent += len(b.Samples)
	return b, nil
}

// wait returns how long row must still wait to keep the recorded pace:
// its time after the first row's, divided by the speed. A row stamped
// before the row ahead of it is due at once.
func (s *fileSource) wait(row *Row) time.Duration {
	speed := s.r.cfg.Speed
	if speed <= 0 {
		return 0
	}
	t := row.Sample.Time.AsTime()
	if !s.started {
		s.started, s.fileT0, s.wallT0 = true, t, time.Now()
		return 0
	}
	due := s.wallT0.Add(time.Duration(float64(t.Sub(s.fileT0)) / speed))
	return time.Until(due)
}
