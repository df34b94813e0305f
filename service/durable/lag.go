package durable

import (
	"context"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// The lag of a replica behind the log, for readiness. Two measures:
//   - when a message is applied: its age (now less the time the stream
//     stored it) and the messages the stream had after it;
//   - once a second (pollLag): the consumer's messages not yet
//     delivered plus those delivered but not applied; none at all means
//     caught up (both lags 0); some while nothing was applied since the
//     last poll means stalled, and the lag in seconds grows from the last
//     message applied.
//
// The ages compare this replica's clock with the NATS servers': they
// must be synchronised (as they must be for the samples' times anyway).

// lagPoll is how often the consumer is asked how far behind it is.
const lagPoll = time.Second

// noteApplied records the lag at a message applied now. l.applyMu is
// held.
func (l *Log) noteApplied(now time.Time, meta *jetstream.MsgMetadata) {
	l.lagMu.Lock()
	defer l.lagMu.Unlock()
	l.appliedAt, l.appliedCons = now, meta.Sequence.Consumer
	l.behind.Store(meta.NumPending)
	var lag int64
	if meta.NumPending > 0 { // else this replica is at the end of the log, however old its last message
		lag = max(0, int64(now.Sub(meta.Timestamp)))
	}
	l.lagNS.Store(lag)
	l.judgeLag(now)
}

// pollLag asks the consumer how far behind this replica is, once a
// second until ctx is done. The ordered consumer answers only between
// its recreations (nats.go holds its lock while it recreates it, which
// can last): a question not answered within lagPoll is left to finish
// by itself, and no other is asked meanwhile; the watchdog (watch)
// judges a stalled consumer then.
func (l *Log) pollLag(ctx context.Context, current func() jetstream.Consumer) {
	t := time.NewTicker(lagPoll)
	defer t.Stop()
	type answer struct {
		info *jetstream.ConsumerInfo
		err  error
	}
	var asking chan answer // the question not yet answered, if any
	defer func() {
		if asking != nil {
			<-asking
		}
	}()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		if asking == nil {
			cons := current()
			if cons == nil {
				continue // not reading the log yet
			}
			asking = make(chan answer, 1)
			go func(ch chan<- answer) {
				ictx, cancel := context.WithTimeout(ctx, lagPoll)
				defer cancel()
				info, err := cons.Info(ictx)
				ch <- answer{info, err}
			}(asking)
		}
		var a answer
		select {
		case a = <-asking:
			asking = nil
		case <-time.After(lagPoll / 2):
			continue // nats.go busy recreating the consumer
		case <-ctx.Done():
			return
		}
		if a.err != nil {
			continue // not connected: Ready says so
		}
		l.notePoll(time.Now(), a.info.NumPending, a.info.Delivered.Consumer, a.info.Delivered.Stream)
	}
}

// noteStall records at now a consumer found stalled by the watchdog
// with up to pending messages for this replica in the stream: the lag
// in seconds grows from the last message applied.
func (l *Log) noteStall(now time.Time, pending uint64) {
	l.lagMu.Lock()
	defer l.lagMu.Unlock()
	l.behind.Store(pending)
	if l.appliedAt.IsZero() {
		l.appliedAt = now
	}
	l.lagNS.Store(max(l.lagNS.Load(), int64(now.Sub(l.appliedAt))))
	l.judgeLag(now)
}

// notePoll records the lag the consumer reports at now: pending messages
// not yet delivered, and the consumer and stream sequences of the last
// delivered. The ordered consumer is recreated, its consumer sequence
// starting again from 1, when it misses heartbeats (a replica that does
// not read for a while, or starved of CPU): then the delivered messages
// not applied are counted as one at least, from the stream sequences.
func (l *Log) notePoll(now time.Time, pending, delivered, deliveredStream uint64) {
	applied := l.applied.Load()
	l.lagMu.Lock()
	defer l.lagMu.Unlock()
	switch {
	case delivered > l.appliedCons:
		pending += delivered - l.appliedCons
	case deliveredStream > applied:
		pending++
	}
	stalled := applied == l.lastPollSeq
	l.lastPollSeq = applied
	switch {
	case pending == 0:
		l.behind.Store(0)
		l.lagNS.Store(0)
	case stalled:
		l.behind.Store(pending)
		if l.appliedAt.IsZero() {
			// Nothing applied since this replica started: the stall counts
			// from the first poll that finds it.
			l.appliedAt = now
		}
		l.lagNS.Store(max(l.lagNS.Load(), int64(now.Sub(l.appliedAt))))
	}
	l.judgeLag(now)
}

// judgeLag decides readiness from the lags, with hysteresis: too far
// behind at once when a lag is over its bound; ready again when both
// have stayed within half their bounds for LagHold. l.lagMu is held.
func (l *Log) judgeLag(now time.Time) {
	msgs, lag := l.behind.Load(), time.Duration(l.lagNS.Load())
	if !l.caughtUp.Load() {
		return // replaying the log at start: Ready says so
	}
	switch {
	case msgs > l.cfg.MaxLagMessages || lag > l.cfg.MaxLag:
		if !l.tooFar.Load() {
			l.log.Warn("replica behind the log: not ready", "messages", msgs, "lag", lag)
		}
		l.tooFar.Store(true)
		l.lastOver, l.underSince = now, time.Time{}
	case msgs <= l.cfg.MaxLagMessages/2 && lag <= l.cfg.MaxLag/2:
		if l.underSince.IsZero() {
			l.underSince = now
		}
		if l.tooFar.Load() && now.Sub(l.underSince) >= l.cfg.LagHold {
			l.tooFar.Store(false)
			l.log.Info("replica caught up with the log: ready", "behind_for", now.Sub(l.lastOver))
		}
	default:
		l.underSince = time.Time{}
	}
}

// The consumer's pause, for tests: while paused, the replica applies
// nothing (a replica starved of CPU, or stuck), and the rest of the
// process goes on.
func (l *Log) pauseApply() {
	ch := make(chan struct{})
	l.paused.Store(&ch)
}

func (l *Log) resumeApply() {
	if ch := l.paused.Swap(nil); ch != nil {
		close(*ch)
	}
}

// waitPaused waits while the consumer is paused, or until ctx is done.
func (l *Log) waitPaused(ctx context.Context) {
	if ch := l.paused.Load(); ch != nil {
		select {
		case <-*ch:
		case <-ctx.Done():
		}
	}
}
