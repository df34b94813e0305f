package durable

import (
	"context"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/test/testenv"
)

// deafConsumer is a consumer of the log that, once deaf is set, delivers
// nothing more and answers no question about itself until its iterator
// is stopped: as an ordered consumer whose node was lost while nats.go
// retries recreating it for good (holding its lock, so that Info waits
// too).
type deafConsumer struct {
	jetstream.Consumer
	deaf    *atomic.Bool
	once    sync.Once
	stopped chan struct{}
}

func (c *deafConsumer) stop() { c.once.Do(func() { close(c.stopped) }) }

func (c *deafConsumer) Messages(opts ...jetstream.PullMessagesOpt) (jetstream.MessagesContext, error) {
	it, err := c.Consumer.Messages(opts...)
	if err != nil {
		return nil, err
	}
	return &deafIter{MessagesContext: it, c: c}, nil
}

func (c *deafConsumer) Info(ctx context.Context) (*jetstream.ConsumerInfo, error) {
	if c.deaf.Load() {
		<-c.stopped
	}
	return c.Consumer.Info(ctx)
}

type deafIter struct {
	jetstream.MessagesContext
	c *deafConsumer
}

func (it *deafIter) Next(opts ...jetstream.NextOpt) (jetstream.Msg, error) {
	if !it.c.deaf.Load() {
		msg, err := it.MessagesContext.Next(opts...)
		if err != nil || !it.c.deaf.Load() {
			return msg, err
		}
		// Delivered after it went deaf: lost.
	}
	<-it.c.stopped
	return nil, jetstream.ErrMsgIteratorClosed
}

func (it *deafIter) Stop() {
	it.c.stop()
	it.MessagesContext.Stop()
}

// TestWatchdogResumesStalledConsumer: the log's consumer stops
// delivering (the first one, or the first two: the one opened again
// stalls too) while batches are written. The watchdog gives each up and
// opens a new one from the message after the last applied; the batch
// written meanwhile is applied and answered, every sample exactly once
// (the ledger's count, and messages applied = the stream's messages);
// the replica says it is behind the log once found stalled (/readyz),
// and each restart is counted.
func TestWatchdogResumesStalledConsumer(t *testing.T) {
	for _, tc := range []struct {
		name string
		deaf int // consumers that go deaf
	}{
		{"one consumer lost", 1},
		{"the next one lost too", 2},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var deaf atomic.Bool
			var opened atomic.Int32
			tl := startTestLogWith(t, func(l *Log) {
				l.wrapConsumer = func(c jetstream.Consumer) jetstream.Consumer {
					if int(opened.Add(1)) > tc.deaf {
						return c
					}
					return &deafConsumer{Consumer: c, deaf: &deaf, stopped: make(chan struct{})}
				}
			}, func(c *Config) {
				// Timeout: the batch waits out the stalls to be applied.
				c.MaxLag, c.LagHold, c.Timeout = time.Second, 2*testenv.WaitLong, testenv.WaitLong
			})

			const perBatch = 4
			batch := func(k0 int) []ingest.Sample {
				var smps []ingest.Sample
				for k := k0; k < k0+perBatch; k++ {
					smps = append(smps, tl.sample(1, k))
				}
				return smps
			}
			if _, err := tl.append(t, batch(0)); err != nil {
				t.Fatal(err)
			}
			tl.waitApplied(t)
			if ok, why := tl.Ready(); !ok {
				t.Fatalf("not ready before the stall: %s", why)
			}

			deaf.Store(true)
			type answer struct {
				res []ingest.Result
				err error
			}
			answered := make(chan answer, 1)
			go func() {
				res, err := tl.append(t, batch(perBatch))
				answered <- answer{res, err}
			}()
			var a answer
			select {
			case a = <-answered:
			case <-time.After(testenv.WaitLong):
				t.Fatal("the batch written while the consumer was stalled was never answered")
			}
			// Found behind the log when found stalled; ready again only
			// after LagHold, here longer than the test.
			if ok, why := tl.Ready(); ok || !strings.Contains(why, "behind the log") {
				t.Errorf("/readyz after the stall: %v %q, want not ready, behind the log", ok, why)
			} else {
				t.Logf("after the stall: %s", why)
			}
			if a.err != nil {
				t.Fatalf("the batch written while the consumer was stalled: %v", a.err)
			}
			for i, r := range a.res {
				if r != ingest.Accepted {
					t.Errorf("sample %d: %v, want accepted", i, r)
				}
			}
			tl.waitApplied(t)
			if got := testutil.ToFloat64(tl.restarts); got != float64(tc.deaf) {
				t.Errorf("genvelope_log_consumer_restarts_total = %g, want %d (one a stalled consumer)", got, tc.deaf)
			}
			if lg := tl.ledger(exampleUnits[1].id); lg.Count != 2*perBatch {
				t.Errorf("%s: %d samples applied, %d written (each once)", exampleUnits[1].id, lg.Count, 2*perBatch)
			}
			info, err := tl.stream.Info(t.Context())
			if err != nil {
				t.Fatal(err)
			}
			if got := testutil.ToFloat64(tl.messages.WithLabelValues("applied")); got != float64(info.State.Msgs) {
				t.Errorf("%g messages applied; the stream holds %d (each applied once)", got, info.State.Msgs)
			}
		})
	}
}
