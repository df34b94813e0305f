package replay

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"sync"
	"time"

	"google.golang.org/grpc"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// Batch is the samples of one PushRequest. Lines is for the caller (the
// file lines of the samples, for example); the sender does not read it.
type Batch struct {
	Samples []*pb.Sample
	Lines   []int
}

// Source gives the batches to send. Next returns io.EOF when there are
// no more; it may block, and must return once ctx is done.
type Source interface {
	Next(ctx context.Context) (*Batch, error)
}

// SourceFunc makes a function a Source.
type SourceFunc func(ctx context.Context) (*Batch, error)

// Next calls f.
func (f SourceFunc) Next(ctx context.Context) (*Batch, error) { return f(ctx) }

// SenderConfig tunes a Sender. The zero value takes the defaults.
type SenderConfig struct {
	// Window is how many batches may await their acknowledgement at
	// once. Default 2. Keep Window times the batch size at or below the
	// server's memory of 256 timestamps per unit, so that a resent batch
	// is answered with duplicates and not with out-of-order rejections.
	Window int
	// Retries is how many times in a row the stream may fail (to open,
	// or while batches are in flight) before Run gives up. An
	// acknowledgement resets the count. Default 8.
	Retries int
	// Backoff is the wait before the first reconnection; it doubles up
	// to MaxBackoff. Defaults 200 ms and 5 s.
	Backoff, MaxBackoff time.Duration
	// AckTimeout is how long the oldest batch may wait for its answer
	// before the stream is taken as broken. Default 30 s.
	AckTimeout time.Duration
	Logger     *slog.Logger
}

func (c SenderConfig) withDefaults() SenderConfig {
	if c.Window <= 0 {
		c.Window = 2
	}
	if c.Retries <= 0 {
		c.Retries = 8
	}
	if c.Backoff <= 0 {
		c.Backoff = 200 * time.Millisecond
	}
	if c.MaxBackoff < c.Backoff {
		c.MaxBackoff = max(c.Backoff, 5*time.Second)
	}
	if c.AckTimeout <= 0 {
		c.AckTimeout = 30 * time.Second
	}
	if c.Logger == nil {
		c.Logger = slog.New(slog.DiscardHandler)
	}
	return c
}

// SendStats says how a Run went.
type SendStats struct {
	Batches    int // batches acknowledged
	Reconnects int // streams opened after the first
	Resent     int // batches sent again after a dropped stream
}

// Sender streams batches to TelemetryService.Stream with a window of
// batches in flight, checks every acknowledgement against its batch, and
// after a dropped stream reconnects and resends what was not
// acknowledged.
type Sender struct {
	client pb.TelemetryServiceClient
	cfg    SenderConfig
}

// NewSender returns a sender over conn.
func NewSender(conn grpc.ClientConnInterface, cfg SenderConfig) *Sender {
	return &Sender{client: pb.NewTelemetryServiceClient(conn), cfg: cfg.withDefaults()}
}

// inflight is a batch sent and not yet acknowledged.
type inflight struct {
	seq   uint64
	batch *Batch
}

// fatalError ends Run without a retry.
type fatalError struct{ err error }

func (e *fatalError) Error() string { return e.err.Error() }
func (e *fatalError) Unwrap() error { return e.err }

// Run sends every batch of src, in order, and calls onAck with each batch
// and the server's answer to it, exactly once per batch, in order, on
// Run's goroutine. It returns when src is exhausted and every batch is
// acknowledged (nil), when ctx is done (its error), when src fails (that
// error), or when the stream failed more than Retries times in a row.
// Batches that were sent but not acknowledged when Run returns with an
// error were not answered.
func (s *Sender) Run(ctx context.Context, src Source, onAck func(*Batch, *pb.PushResponse)) (SendStats, error) {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()

	// The source is read on a goroutine of its own, so that a blocking
	// Next (a ticker, a paced file) never holds up the acknowledgements.
	items := make(chan sourceItem)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		for {
			b, err := src.Next(ctx)
			select {
			case items <- sourceItem{b, err}:
			case <-ctx.Done():
				return
			}
			if err != nil {
				return
			}
		}
	}()
	defer wg.Wait()
	defer cancel() // before the wait: it ends the source goroutine

	st := &runState{sender: s, items: items, onAck: onAck}
	failures := 0
	backoff := s.cfg.Backoff
	for first := true; ; first = false {
		if !first {
			st.stats.Reconnects++
		}
		acked := st.stats.Batches
		done, err := st.stream(ctx)
		if done {
			return st.stats, nil
		}
		var fe *fatalError
		switch {
		case ctx.Err() != nil:
			return st.stats, ctx.Err()
		case errors.As(err, &fe):
			return st.stats, fe.err
		}
		if st.stats.Batches > acked {
			failures, backoff = 0, s.cfg.Backoff
		}
		failures++
		if failures > s.cfg.Retries {
			return st.stats, fmt.Errorf("the telemetry stream failed %d times in a row; last: %w", failures, err)
		}
		s.cfg.Logger.Warn("telemetry stream failed; reconnecting", "err", err, "unacknowledged_batches", len(st.pending), "wait", backoff)
		t := time.NewTimer(backoff)
		select {
		case <-ctx.Done():
			t.Stop()
			return st.stats, ctx.Err()
		case <-t.C:
		}
		backoff = min(2*backoff, s.cfg.MaxBackoff)
	}
}

// sourceItem is what the source goroutine hands over: a batch or the
// error that ends the source.
type sourceItem struct {
	b   *Batch
	err error
}

// runState is what lives across the streams of one Run.
type runState struct {
	sender  *Sender
	items   <-chan sourceItem
	onAck   func(*Batch, *pb.PushResponse)
	pending []inflight
	nextSeq uint64
	srcDone bool
	stats   SendStats
}

// stream opens one stream, resends what is pending, then sends and
// acknowledges until the source is exhausted and everything is answered
// (done) or the stream fails (err).
func (st *runState) stream(ctx context.Context) (done bool, err error) {
	cfg := st.sender.cfg
	sctx, cancel := context.WithCancel(ctx)
	defer cancel()
	stream, err := st.sender.client.Stream(sctx)
	if err != nil {
		return false, fmt.Errorf("open stream: %w", err)
	}
	type answer struct {
		resp *pb.PushResponse
		err  error
	}
	answers := make(chan answer)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		for {
			resp, err := stream.Recv()
			select {
			case answers <- answer{resp, err}:
			case <-sctx.Done():
				return
			}
			if err != nil {
				return
			}
		}
	}()
	defer wg.Wait()
	defer cancel()

	broken := false // a Send failed: the reason comes from Recv
	send := func(f inflight) {
		if broken {
			return
		}
		if err := stream.Send(&pb.PushRequest{Sequence: f.seq, Samples: f.batch.Samples}); err != nil {
			broken = true
		}
	}
	for _, f := range st.pending {
		st.stats.Resent++
		send(f)
	}
	ackTimer := time.NewTimer(cfg.AckTimeout)
	defer ackTimer.Stop()
	closed := false
	for {
		if st.srcDone && len(st.pending) == 0 && !closed {
			if err := stream.CloseSend(); err != nil {
				return true, nil // everything is answered; how the stream ends does not matter
			}
			closed = true
		}
		var items <-chan sourceItem
		if !st.srcDone && !broken && len(st.pending) < cfg.Window {
			items = st.items
		}
		select {
		case <-ctx.Done():
			return false, ctx.Err()
		case it := <-items:
			if it.err != nil {
				if errors.Is(it.err, io.EOF) {
					st.srcDone = true
					continue
				}
				return false, &fatalError{it.err}
			}
			if len(it.b.Samples) == 0 {
				continue
			}
			st.nextSeq++
			f := inflight{seq: st.nextSeq, batch: it.b}
			if len(st.pending) == 0 {
				ackTimer.Reset(cfg.AckTimeout)
			}
			st.pending = append(st.pending, f)
			send(f)
		case a := <-answers:
			if a.err != nil {
				if closed {
					return true, nil // all answered; how the stream ends does not matter
				}
				if errors.Is(a.err, io.EOF) {
					return false, errors.New("the server ended the stream with batches unanswered")
				}
				return false, a.err
			}
			if len(st.pending) == 0 {
				return false, &fatalError{fmt.Errorf("the server answered sequence %d, but no batch is waiting", a.resp.Sequence)}
			}
			head := st.pending[0]
			if err := check(head, a.resp); err != nil {
				return false, &fatalError{err}
			}
			st.pending = st.pending[1:]
			st.stats.Batches++
			st.onAck(head.batch, a.resp)
			ackTimer.Reset(cfg.AckTimeout)
		case <-ackTimer.C:
			if closed {
				return true, nil // all answered; the server did not end the stream in time
			}
			if len(st.pending) > 0 {
				return false, fmt.Errorf("no answer to batch %d within %s", st.pending[0].seq, cfg.AckTimeout)
			}
			ackTimer.Reset(cfg.AckTimeout)
		}
	}
}

// check verifies that resp answers f: the same sequence, and every sample
// counted exactly once.
func check(f inflight, resp *pb.PushResponse) error {
	if resp.Sequence != f.seq {
		return fmt.Errorf("the server answered sequence %d where %d was due: the answers are out of order", resp.Sequence, f.seq)
	}
	n := len(f.batch.Samples)
	got := int(resp.Accepted) + int(resp.Duplicates) + len(resp.Rejected)
	if got != n {
		return fmt.Errorf("the answer to batch %d counts %d samples, the batch has %d", f.seq, got, n)
	}
	for _, r := range resp.Rejected {
		if int(r.Index) >= n {
			return fmt.Errorf("the answer to batch %d rejects sample %d of %d", f.seq, r.Index, n)
		}
	}
	return nil
}
