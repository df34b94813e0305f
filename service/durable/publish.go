package durable

import (
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/genvelope/genvelope/service/ingest"
)

// The telemetry publisher. Each partition has a queue and a goroutine
// that writes it: one message in flight per partition, and whatever
// batches arrived meanwhile go together into the next message (group
// commit). Under load a message carries several batches' samples of
// its partition, so the stream stores fewer, larger messages: its cost
// is mostly per message (a write, an acknowledgement, a delivery). A
// lone batch goes out at once.
//
// Order: a partition's segments are written in the order Append queued
// them, so a unit's samples enter the log in the order their batches
// were appended. A batch is acknowledged only when every message
// carrying its segments has been acknowledged by the stream and applied
// here; one failed or unconfirmed message fails every batch in it.

// segment is one batch's samples of one partition (or part of them,
// within the message size limit).
type segment struct {
	smps       []ingest.Sample // copies, in the batch's order
	pos        []int           // smps[j] is sample pos[j] of the batch
	boundBytes int             // bound of its encoded size

	// Set by the writer before pub is signalled: the message that
	// carries the segment and where its samples start in it.
	msg *waiter
	off int
	pub chan error // the stream's answer for that message; buffered
}

// partQueue is a partition's queue of segments to write.
type partQueue struct {
	mu      sync.Mutex
	pending []*segment
	closed  bool          // the writer has ended
	kick    chan struct{} // buffered: something was queued
}

var errClosed = errors.New("the log is closed")

// startWriters starts a writer per partition served; Close ends them.
func (l *Log) startWriters() {
	l.quit = make(chan struct{})
	l.queues = make([]*partQueue, l.cfg.Partitions)
	for p := range l.queues {
		if !l.serves[p] {
			continue
		}
		q := &partQueue{kick: make(chan struct{}, 1)}
		l.queues[p] = q
		l.writers.Add(1)
		go func() {
			defer l.writers.Done()
			l.write(p, q)
		}()
	}
}

// stopWriters ends the writers, failing what they still hold. A second
// call does nothing.
func (l *Log) stopWriters() {
	l.stopOnce.Do(func() {
		if l.quit != nil {
			close(l.quit)
		}
	})
	l.writers.Wait()
}

// queue hands segments of partition p to its writer.
func (l *Log) queue(p int, segs []*segment) error {
	q := l.queues[p]
	if q == nil {
		return fmt.Errorf("partition %d is not served here", p)
	}
	q.mu.Lock()
	if q.closed {
		q.mu.Unlock()
		return errClosed
	}
	q.pending = append(q.pending, segs...)
	q.mu.Unlock()
	select {
	case q.kick <- struct{}{}:
	default:
	}
	return nil
}

// take removes from q the segments of the next message: at least one,
// and then as many as fit within limit bytes.
func (q *partQueue) take(limit int) []*segment {
	q.mu.Lock()
	defer q.mu.Unlock()
	n, size := 0, 0
	for n < len(q.pending) && (n == 0 || size+q.pending[n].boundBytes <= limit) {
		size += q.pending[n].boundBytes
		n++
	}
	segs := q.pending[:n:n]
	q.pending = q.pending[n:]
	if len(q.pending) == 0 {
		q.pending = nil
	}
	return segs
}

// write is partition p's writer: it writes q's segments, a message at a
// time, until the log closes.
func (l *Log) write(p int, q *partQueue) {
	var enc sampleEncoder
	var parts []samplesRef
	subject := l.subject(p)
	for {
		select {
		case <-l.quit:
			q.mu.Lock()
			q.closed = true
			segs := q.pending
			q.pending = nil
			q.mu.Unlock()
			answer(segs, errClosed)
			return
		case <-q.kick:
		}
		for segs := q.take(l.messageLimit()); len(segs) > 0; segs = q.take(l.messageLimit()) {
			parts = parts[:0]
			n := 0
			for _, s := range segs {
				s.off = n
				n += len(s.smps)
				parts = append(parts, samplesRef{smps: s.smps})
			}
			id, w := l.register(n)
			for _, s := range segs {
				s.msg = w
			}
			msg := &nats.Msg{Subject: subject, Header: nats.Header{formatHeader: {formatSamples}, idHeader: {id}},
				Data: enc.encode(make([]byte, 0, 16+n*48), parts)}
			err := l.publish(msg)
			if err != nil {
				l.forget([]string{id})
				l.pubFailed.Inc()
			} else {
				l.writtenMsg.Inc()
				l.writtenSmp.Add(float64(n))
			}
			answer(segs, err)
		}
	}
}

func answer(segs []*segment, err error) {
	for _, s := range segs {
		s.pub <- err
	}
}

// publish writes msg and waits for the stream's acknowledgement, at
// most Timeout.
func (l *Log) publish(msg *nats.Msg) error {
	fut, err := l.js.PublishMsgAsync(msg, jetstream.WithExpectStream(l.cfg.Stream))
	if err != nil {
		return fmt.Errorf("writing to the log: %w", err)
	}
	timer := time.NewTimer(l.cfg.Timeout)
	defer timer.Stop()
	select {
	case <-fut.Ok():
		return nil
	case err := <-fut.Err():
		return fmt.Errorf("writing to the log: %w", err)
	case <-timer.C:
		return fmt.Errorf("the log did not confirm the write within %s", l.cfg.Timeout)
	case <-l.quit:
		return errClosed
	}
}

// messageLimit is the largest message the writers make: half the
// server's largest payload.
func (l *Log) messageLimit() int {
	if limit := int(l.nc.MaxPayload()) / 2; limit > 0 {
		return limit
	}
	return 512 << 10
}
