// Package durable makes genvelope's acknowledgements durable and its
// state replicated on a NATS JetStream stream.
//
// A batch's samples that pass the checks are written to the stream
// (subjects <prefix>.telemetry.<partition>, units mapped to partitions by
// Partition), and the batch is answered only after JetStream has stored
// them and this replica has applied them from the stream: an
// acknowledgement means "in the log". Every replica consumes the
// partitions it serves in log order and builds its state from the log
// alone, applying a sample at most once per (unit, timestamp): ingest's
// own rule (a timestamp not newer than the unit's latest is a duplicate
// or out of order, and changes nothing). The log's own storage time is
// the sample's arrival time, so every replica sees the same one.
// Operator actions go to <prefix>.ops and are applied in the same order
// by every replica. A checkpoint file keeps the state with the stream
// sequence it includes; a restart loads it and replays the log from the
// next sequence, so a kill -9 loses nothing that was acknowledged.
package durable

import (
	"bytes"
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
)

// Config is what a durable log needs.
type Config struct {
	URLs      []string // NATS servers, e.g. nats://10.0.0.1:4222
	CredsFile string   // NATS credentials (JWT and seed); "" for none
	// TLS: a CA to verify the servers with, and a client certificate and
	// key when the servers ask for one. Any of them turns TLS on.
	TLSCA, TLSCert, TLSKey string

	Prefix     string        // subject prefix; default "genvelope"
	Stream     string        // stream name; default the prefix in capitals
	Partitions int           // number of partitions; default DefaultPartitions
	Serves     string        // partitions this replica serves, "0-3"; default all
	Replicas   int           // stream replicas (3 in a cluster); default 1
	MaxAge     time.Duration // how long the stream keeps messages; default 7 days

	// CheckpointPath is the checkpoint file: the state with the stream
	// sequence it includes, written every CheckpointInterval and at stop.
	// "" keeps none (a restart replays the whole log).
	CheckpointPath     string
	CheckpointInterval time.Duration // default 5 s

	// Timeout bounds each wait on the log: the stream's acknowledgement
	// of a publish, and this replica applying it. Default 5 s.
	Timeout time.Duration

	// MaxLag and MaxLagMessages: a replica that has caught up once is
	// not ready again (Ready, /readyz) while it is behind the log by more
	// than MaxLag (the age of the message it applies; default 5 s) or
	// MaxLagMessages messages (default 10000). It is ready again once
	// both lags have stayed within half of these for LagHold (default
	// 2 s), so that it does not flap.
	MaxLag         time.Duration
	MaxLagMessages uint64
	LagHold        time.Duration

	Logger *slog.Logger
}

func (c Config) withDefaults() Config {
	if c.Prefix == "" {
		c.Prefix = "genvelope"
	}
	if c.Stream == "" {
		c.Stream = strings.Map(func(r rune) rune {
			switch {
			case r >= 'a' && r <= 'z':
				return r - 'a' + 'A'
			case r >= 'A' && r <= 'Z', r >= '0' && r <= '9', r == '-', r == '_':
				return r
			}
			return '_'
		}, c.Prefix)
	}
	if c.Partitions <= 0 {
		c.Partitions = DefaultPartitions
	}
	if c.Replicas <= 0 {
		c.Replicas = 1
	}
	if c.MaxAge <= 0 {
		c.MaxAge = 7 * 24 * time.Hour
	}
	if c.CheckpointInterval <= 0 {
		c.CheckpointInterval = 5 * time.Second
	}
	if c.Timeout <= 0 {
		c.Timeout = 5 * time.Second
	}
	if c.MaxLag <= 0 {
		c.MaxLag = 5 * time.Second
	}
	if c.MaxLagMessages == 0 {
		c.MaxLagMessages = 10000
	}
	if c.LagHold <= 0 {
		c.LagHold = 2 * time.Second
	}
	if c.Logger == nil {
		c.Logger = slog.Default()
	}
	return c
}

// Log is a replica's view of the stream: it writes samples and operator
// actions, and applies what the stream holds to the store.
type Log struct {
	cfg    Config
	log    *slog.Logger
	nc     *nats.Conn
	js     jetstream.JetStream
	stream jetstream.Stream
	serves []bool
	origin string // this process's prefix of message ids
	nextID atomic.Uint64
	full   atomic.Pointer[fleet.Fleet] // the whole fleet, to name the partition of a unit served elsewhere

	store  *ingest.Store
	reload func(at time.Time) error

	mu      sync.Mutex
	pending map[string]*waiter // messages of this process not yet applied, by id

	// applyMu is held while one message is applied, so that a
	// checkpoint sees the state of a whole number of messages.
	applyMu sync.Mutex
	seq     uint64             // the last stream sequence applied
	gen     uint64             // the generation of the current consumer (Run): only it applies
	ledger  map[string]*Ledger // per unit: what has been applied
	dec     sampleDecoder
	ledgers []*Ledger         // of the decoded message's id table
	units   []ingest.Resolver // by partition: its units, each resolved once (ingest.Resolver)
	intern  map[string]string

	cpMu  sync.Mutex   // one checkpoint written at a time
	cpBuf bytes.Buffer // the checkpoint's encoding, kept between checkpoints

	// The partitions' writers (publish.go).
	queues   []*partQueue // by partition; nil for one not served
	quit     chan struct{}
	stopOnce sync.Once
	writers  sync.WaitGroup

	lastSweep    time.Time    // the latest time swept; sweeps never go back
	sweptAt      atomic.Int64 // wall clock, Unix ns, of the last sweep applied
	sweepingHere atomic.Bool  // sweeping by this replica's clock (the log unreachable)

	applied  atomic.Uint64 // seq, for readers without applyMu
	lastSeq  atomic.Uint64 // the stream's last sequence when last asked
	caughtUp atomic.Bool
	behind   atomic.Uint64 // messages of the log not yet applied (the lag in messages)

	// The lag (lag.go): the age of the last message applied when it was
	// applied, or since the last one while stalled; whether the replica
	// is too far behind to be ready.
	lagMu       sync.Mutex
	lagNS       atomic.Int64
	tooFar      atomic.Bool
	lastOver    time.Time                     // last time a lag was over its bound
	underSince  time.Time                     // since when both lags have been within half their bounds
	appliedAt   time.Time                     // wall clock of the last message applied (before any, of the first stalled poll)
	appliedCons uint64                        // its consumer sequence
	lastPollSeq uint64                        // the sequence applied at the previous poll
	paused      atomic.Pointer[chan struct{}] // tests: the consumer waits while set

	// wrapConsumer, for tests, wraps each consumer Run opens (one that
	// stops delivering, as after the loss of the node that held it).
	wrapConsumer func(jetstream.Consumer) jetstream.Consumer

	messages   *prometheus.CounterVec
	pubFailed  prometheus.Counter
	restarts   prometheus.Counter // consumers given up by the watchdog
	writtenMsg prometheus.Counter // telemetry messages written
	writtenSmp prometheus.Counter // and the samples they carry
	seqGauge   prometheus.GaugeFunc
	connected  prometheus.GaugeFunc
	caughtUpGa prometheus.GaugeFunc
	behindGa   prometheus.GaugeFunc
	lagGa      prometheus.GaugeFunc
	tooFarGa   prometheus.GaugeFunc
}

// Ledger is what a replica has applied of one unit: the number of
// samples and the sum (mod 2^64) of SampleDigest over them. Two replicas
// that applied the same samples have equal ledgers, in any order.
type Ledger struct {
	Count  uint64 `json:"count"`
	Digest uint64 `json:"digest"`

	idHash uint64 // digestID of the unit's id, once hashed is set
	hashed bool
}

// SampleDigest is the 64-bit FNV-1a hash of a sample's identity: the
// unit id's bytes followed by its time in Unix ns, 8 bytes little endian.
func SampleDigest(id string, unixNS int64) uint64 {
	return digestTime(digestID(id), unixNS)
}

// digestID is FNV-1a 64 over the id's bytes: the state SampleDigest
// continues from with the time.
func digestID(id string) uint64 {
	h := uint64(14695981039346656037)
	for i := 0; i < len(id); i++ {
		h ^= uint64(id[i])
		h *= 1099511628211
	}
	return h
}

// digestTime continues FNV-1a 64 from h over unixNS, 8 bytes little
// endian.
func digestTime(h uint64, unixNS int64) uint64 {
	for i := 0; i < 8; i++ {
		h ^= uint64(byte(unixNS >> (8 * i)))
		h *= 1099511628211
	}
	return h
}

// add counts the sample of unit id at unixNS, hashing the id once per
// ledger.
func (lg *Ledger) add(id string, unixNS int64) {
	if !lg.hashed {
		lg.idHash, lg.hashed = digestID(id), true
	}
	lg.Count++
	lg.Digest += digestTime(lg.idHash, unixNS)
}

// waiter is a message of this process awaiting its application.
type waiter struct {
	done    chan struct{}
	results []ingest.Result
	details []string
	err     error // of an operator action
}

// Open connects to NATS and makes sure the stream exists with the
// configuration asked for. It fails, naming the servers, when none can
// be reached.
func Open(ctx context.Context, cfg Config) (*Log, error) {
	cfg = cfg.withDefaults()
	if len(cfg.URLs) == 0 {
		return nil, errors.New("durable: no NATS server URL")
	}
	serves, err := ParsePartitions(cfg.Serves, cfg.Partitions)
	if err != nil {
		return nil, err
	}
	var idb [6]byte
	_, _ = rand.Read(idb[:])
	l := &Log{cfg: cfg, log: cfg.Logger, serves: serves, origin: hex.EncodeToString(idb[:]),
		pending: map[string]*waiter{}, ledger: map[string]*Ledger{}, intern: map[string]string{},
		units: make([]ingest.Resolver, cfg.Partitions)}
	l.dec.intern = l.internID
	urls := strings.Join(cfg.URLs, ",")
	opts := []nats.Option{
		nats.Name("genvelope " + l.origin),
		nats.Timeout(5 * time.Second),
		nats.MaxReconnects(-1),
		nats.ReconnectWait(250 * time.Millisecond),
		// No reconnect buffer: a publish while disconnected fails at once,
		// so a batch is answered UNAVAILABLE rather than held.
		nats.ReconnectBufSize(-1),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			l.log.Error("NATS connection lost; telemetry is answered UNAVAILABLE until it is back", "err", err)
		}),
		nats.ReconnectHandler(func(c *nats.Conn) {
			l.log.Info("NATS connection back", "server", c.ConnectedUrlRedacted())
		}),
	}
	if cfg.CredsFile != "" {
		opts = append(opts, nats.UserCredentials(cfg.CredsFile))
	}
	if cfg.TLSCA != "" {
		opts = append(opts, nats.RootCAs(cfg.TLSCA))
	}
	if cfg.TLSCert != "" || cfg.TLSKey != "" {
		opts = append(opts, nats.ClientCert(cfg.TLSCert, cfg.TLSKey))
	}
	if cfg.TLSCA != "" || cfg.TLSCert != "" {
		opts = append(opts, nats.Secure())
	}
	if l.nc, err = nats.Connect(urls, opts...); err != nil {
		return nil, fmt.Errorf("NATS at %s unreachable: %w", urls, err)
	}
	if l.js, err = jetstream.New(l.nc, jetstream.WithPublishAsyncMaxPending(4096)); err != nil {
		l.nc.Close()
		return nil, fmt.Errorf("NATS at %s: %w", urls, err)
	}
	sctx, cancel := context.WithTimeout(ctx, 4*cfg.Timeout)
	defer cancel()
	l.stream, err = l.js.CreateOrUpdateStream(sctx, jetstream.StreamConfig{
		Name:        cfg.Stream,
		Description: "genvelope telemetry and operator actions",
		Subjects:    []string{cfg.Prefix + ".telemetry.*", cfg.Prefix + ".ops"},
		Storage:     jetstream.FileStorage,
		Replicas:    cfg.Replicas,
		MaxAge:      cfg.MaxAge,
		Retention:   jetstream.LimitsPolicy,
		Discard:     jetstream.DiscardOld,
	})
	if err != nil {
		l.nc.Close()
		return nil, fmt.Errorf("NATS at %s: stream %s (subjects %s.telemetry.*, %s.ops, %d replicas): %w",
			urls, cfg.Stream, cfg.Prefix, cfg.Prefix, cfg.Replicas, err)
	}
	l.metrics()
	l.startWriters()
	l.log.Info("durable log", "nats", l.nc.ConnectedUrlRedacted(), "stream", cfg.Stream, "prefix", cfg.Prefix,
		"partitions", cfg.Partitions, "serves", formatPartitions(serves), "replicas", cfg.Replicas)
	return l, nil
}

// Close ends the writers (a batch still waiting for one is answered
// with an error) and closes the connection to NATS.
func (l *Log) Close() {
	l.stopWriters()
	l.nc.Close()
}

// served reports whether this replica serves unit id's partition.
func (l *Log) served(id string) bool { return l.serves[Partition(id, l.cfg.Partitions)] }

// Select returns the part of fl this replica serves; the server builds
// its store (and every reload) from it.
func (l *Log) Select(fl *fleet.Fleet) *fleet.Fleet {
	l.full.Store(fl)
	return fl.Subset(func(u *fleet.Unit) bool { return l.served(u.ID) })
}

// Check says what would become of smp: a unit served by another replica
// is refused with its partition; the rest is ingest's check against the
// state applied so far. units (nil: none) is the resolver of the stream
// smp came on.
func (l *Log) Check(units *ingest.Resolver, now time.Time, smp *ingest.Sample) (ingest.Result, string) {
	if !l.served(smp.UnitID) && l.full.Load().Unit(smp.UnitID) != nil {
		return ingest.RejectUnknownUnit, fmt.Sprintf("unit %q is in partition %d, which this replica does not serve (it serves %s): send it to a replica that does",
			smp.UnitID, Partition(smp.UnitID, l.cfg.Partitions), formatPartitions(l.serves))
	}
	return l.store.CheckFrom(units, now, smp)
}

func (l *Log) subject(part int) string {
	return l.cfg.Prefix + ".telemetry." + strconv.Itoa(part)
}

// register notes a message of this process before it is published.
func (l *Log) register(n int) (string, *waiter) {
	id := l.origin + "-" + strconv.FormatUint(l.nextID.Add(1), 10)
	w := &waiter{done: make(chan struct{}), results: make([]ingest.Result, n), details: make([]string, n)}
	l.mu.Lock()
	l.pending[id] = w
	l.mu.Unlock()
	return id, w
}

func (l *Log) forget(ids []string) {
	l.mu.Lock()
	for _, id := range ids {
		delete(l.pending, id)
	}
	l.mu.Unlock()
}

// Append hands smps to the partitions' writers (publish.go) and
// returns at once; wait waits until the stream has stored every message
// carrying them and this replica has applied those, and returns what
// applying gave for each sample. Batches appended one after another
// enter each partition of the log in that order, so a stream of batches
// can be pipelined. wait must be called (with a done ctx to give up).
func (l *Log) Append(ctx context.Context, _ time.Time, smps []ingest.Sample) (func(context.Context) ([]ingest.Result, []string, error), error) {
	// The samples, copied partition by partition (a counting sort that
	// keeps their order within a partition): each writer then reads its
	// segments' samples one after the other in memory, rather than
	// scattered through the batch.
	np := l.cfg.Partitions
	part := make([]int32, len(smps))
	start := make([]int, np+1)
	for i := range smps {
		p := Partition(smps[i].UnitID, np)
		part[i] = int32(p)
		start[p+1]++
	}
	for p := range np {
		start[p+1] += start[p]
	}
	sorted := make([]ingest.Sample, len(smps))
	pos := make([]int, len(smps)) // sorted[j] is smps[pos[j]]
	next := make([]int, np)
	copy(next, start)
	for i := range smps {
		j := next[part[i]]
		next[part[i]]++
		sorted[j], pos[j] = smps[i], i
	}
	var segs []*segment
	limit := l.messageLimit()
	for p := range np {
		lo, hi := start[p], start[p+1]
		if lo == hi {
			continue
		}
		var ps []*segment
		for _, n := range chunkSamples(sorted[lo:hi], limit) {
			ps = append(ps, &segment{smps: sorted[lo : lo+n], pos: pos[lo : lo+n], boundBytes: encodedBound(sorted[lo : lo+n]), pub: make(chan error, 1)})
			lo += n
		}
		if err := l.queue(p, ps); err != nil {
			return nil, err // what was queued is written; the batch is not acknowledged
		}
		segs = append(segs, ps...)
	}
	n := len(smps)
	return func(ctx context.Context) ([]ingest.Result, []string, error) {
		timer := time.NewTimer(l.cfg.Timeout)
		defer timer.Stop()
		for _, s := range segs {
			select {
			case err := <-s.pub:
				if err != nil {
					return nil, nil, err
				}
			case <-timer.C:
				l.pubFailed.Inc()
				return nil, nil, fmt.Errorf("the log did not confirm the write within %s", l.cfg.Timeout)
			case <-ctx.Done():
				return nil, nil, ctx.Err()
			}
		}
		res := make([]ingest.Result, n)
		det := make([]string, n)
		for _, s := range segs {
			select {
			case <-s.msg.done:
			case <-timer.C:
				return nil, nil, fmt.Errorf("written to the log but not applied here within %s (the replica is behind)", l.cfg.Timeout)
			case <-ctx.Done():
				return nil, nil, ctx.Err()
			}
			for j, i := range s.pos {
				res[i], det[i] = s.msg.results[s.off+j], s.msg.details[s.off+j]
			}
		}
		return res, det, nil
	}, nil
}

// chunkSamples splits smps into runs of at most limit encoded bytes (a
// single sample larger than that goes alone) and returns their lengths.
func chunkSamples(smps []ingest.Sample, limit int) []int {
	if len(smps) == 0 {
		return nil
	}
	var out []int
	start, size := 0, 0
	for j := range smps {
		n := len(smps[j].UnitID) + maxSampleBytes
		if j > start && size+n > limit {
			out = append(out, j-start)
			start, size = j, 0
		}
		size += n
	}
	return append(out, len(smps)-start)
}

// checkAction refuses, before anything is written to the log, an
// operator action without an operator or on a unit this replica does
// not serve.
func (l *Log) checkAction(id, by string) error {
	if strings.TrimSpace(by) == "" {
		return ingest.ErrNoOperator
	}
	if l.store.Unit(id) == nil {
		return fmt.Errorf("%w %q", ingest.ErrUnknownUnit, ingest.ClipID(id))
	}
	return nil
}

// Acknowledge implements ingest.Actions through the log.
func (l *Log) Acknowledge(ctx context.Context, id string, k alarm.Kind, now time.Time, by string) error {
	if err := l.checkAction(id, by); err != nil {
		return err
	}
	return l.publishOp(ctx, op{Op: "acknowledge", Unit: id, Alarm: k.String(), By: by, AtUnixNS: now.UnixNano()})
}

// Shelve implements ingest.Actions through the log.
func (l *Log) Shelve(ctx context.Context, id string, k alarm.Kind, until, now time.Time, by string) error {
	if err := l.checkAction(id, by); err != nil {
		return err
	}
	o := op{Op: "shelve", Unit: id, Alarm: k.String(), By: by, AtUnixNS: now.UnixNano()}
	if !until.IsZero() {
		o.UntilUnixNS = until.UnixNano()
	}
	return l.publishOp(ctx, o)
}

// ResetThermal implements ingest.Actions through the log.
func (l *Log) ResetThermal(ctx context.Context, id, winding string, now time.Time, by, reason string) error {
	if err := l.checkAction(id, by); err != nil {
		return err
	}
	if winding != "" && winding != "armature" && winding != "field" {
		return fmt.Errorf("winding %q: give armature, field or nothing for both", winding)
	}
	return l.publishOp(ctx, op{Op: "reset", Unit: id, Winding: winding, By: by, Reason: reason, AtUnixNS: now.UnixNano()})
}

// DiscardSample implements ingest.Actions through the log.
func (l *Log) DiscardSample(ctx context.Context, id string, at, now time.Time, by, reason string) error {
	if err := l.checkAction(id, by); err != nil {
		return err
	}
	return l.publishOp(ctx, op{Op: "discard", Unit: id, SampleUnixNS: at.UnixNano(), By: by, Reason: reason, AtUnixNS: now.UnixNano()})
}

// Reload asks every replica, through the log, to read its fleet file
// again; it returns this replica's result.
func (l *Log) Reload(ctx context.Context) error {
	return l.publishOp(ctx, op{Op: "reload", AtUnixNS: time.Now().UnixNano()})
}

// sweepFallback is how long this replica goes without applying a sweep
// from the log before it runs its own (the log is unreachable).
const sweepFallback = 3 * time.Second

// Sweep runs the wall-clock supervision (stale telemetry, shelf expiry,
// the thermal memory while telemetry pauses: ingest.Store.Sweep) through
// the log, so that every replica runs it at the same place among the
// samples and derives the same alarms and journal entries. Every
// replica writes a sweep for each whole second of its clock, with the
// message id <prefix>-sweep-<Unix s>: the stream keeps the first and
// drops the others as duplicates (its de-duplication window, 2 minutes
// by default, holds one id a second). When the log cannot be written and
// no sweep has been applied for sweepFallback, the replica sweeps by its
// own clock (those journal entries carry no log sequence), so that stale
// telemetry is still raised while NATS is lost.
func (l *Log) Sweep(ctx context.Context, now time.Time) {
	sec := now.Truncate(time.Second)
	data, err := jsonMarshal(op{Op: "sweep", AtUnixNS: sec.UnixNano()})
	if err == nil {
		ctx, cancel := context.WithTimeout(ctx, min(l.cfg.Timeout, time.Second))
		defer cancel()
		msg := &nats.Msg{Subject: l.cfg.Prefix + ".ops", Header: nats.Header{formatHeader: {formatOp},
			nats.MsgIdHdr: {l.cfg.Prefix + "-sweep-" + strconv.FormatInt(sec.Unix(), 10)}}, Data: data}
		_, err = l.js.PublishMsg(ctx, msg, jetstream.WithExpectStream(l.cfg.Stream))
	}
	if err == nil {
		if l.sweepingHere.Swap(false) {
			l.log.Info("the log takes the sweeps again: supervision back at the same place on every replica")
		}
		return
	}
	if time.Since(time.Unix(0, l.sweptAt.Load())) < sweepFallback {
		return
	}
	if !l.sweepingHere.Swap(true) {
		l.log.Warn("the log is unreachable: supervising stale telemetry and shelves by this replica's clock", "err", err)
	}
	l.applyMu.Lock()
	defer l.applyMu.Unlock()
	l.sweep(now)
}

func (l *Log) publishOp(ctx context.Context, o op) error {
	data, err := jsonMarshal(o)
	if err != nil {
		return err
	}
	id, w := l.register(0)
	defer l.forget([]string{id})
	ctx, cancel := context.WithTimeout(ctx, l.cfg.Timeout)
	defer cancel()
	msg := &nats.Msg{Subject: l.cfg.Prefix + ".ops", Header: nats.Header{formatHeader: {formatOp}, idHeader: {id}}, Data: data}
	if _, err := l.js.PublishMsg(ctx, msg, jetstream.WithExpectStream(l.cfg.Stream)); err != nil {
		l.pubFailed.Inc()
		return fmt.Errorf("%w: %v", ingest.ErrUnavailable, err)
	}
	select {
	case <-w.done:
		return w.err
	case <-ctx.Done():
		return fmt.Errorf("%w: written to the log but not applied here: %v", ingest.ErrUnavailable, ctx.Err())
	}
}

// Ready reports whether this replica is connected and has applied the
// log up to its end.
func (l *Log) Ready() (bool, string) {
	if !l.nc.IsConnected() {
		return false, "not connected to NATS"
	}
	if !l.caughtUp.Load() {
		return false, fmt.Sprintf("replaying the log: at sequence %d of %d", l.applied.Load(), l.lastSeq.Load())
	}
	if l.tooFar.Load() {
		return false, fmt.Sprintf("behind the log: %d messages, %.1f s (bounds --nats-max-lag-messages %d, --nats-max-lag %s; ready again within half of both for %s)",
			l.behind.Load(), float64(l.lagNS.Load())/1e9, l.cfg.MaxLagMessages, l.cfg.MaxLag, l.cfg.LagHold)
	}
	return true, fmt.Sprintf("caught up with the log at sequence %d", l.applied.Load())
}

// Applied returns the last stream sequence applied.
func (l *Log) Applied() uint64 { return l.applied.Load() }

func (l *Log) metrics() {
	l.messages = prometheus.NewCounterVec(prometheus.CounterOpts{
		Namespace: "genvelope", Name: "log_messages_total",
		Help: "Messages read from the log, by result: applied, other_partition (served by another replica), or foreign (not genvelope's; skipped).",
	}, []string{"result"})
	for _, r := range []string{"applied", "other_partition", "foreign"} {
		l.messages.WithLabelValues(r)
	}
	l.pubFailed = prometheus.NewCounter(prometheus.CounterOpts{
		Namespace: "genvelope", Name: "log_write_failures_total",
		Help: "Writes to the log that failed or were not confirmed in time; their batches were answered UNAVAILABLE.",
	})
	l.restarts = prometheus.NewCounter(prometheus.CounterOpts{
		Namespace: "genvelope", Name: "log_consumer_restarts_total",
		Help: "Times the log's consumer delivered nothing for 3 s while the log held messages for this replica, and was given up for a new one reading from the message after the last applied (a NATS node lost, or its consumer gone).",
	})
	l.writtenMsg = prometheus.NewCounter(prometheus.CounterOpts{
		Namespace: "genvelope", Name: "log_telemetry_messages_written_total",
		Help: "Telemetry messages written to the log and acknowledged by the stream: each carries a partition's samples of one batch or, under load, of several.",
	})
	l.writtenSmp = prometheus.NewCounter(prometheus.CounterOpts{
		Namespace: "genvelope", Name: "log_samples_written_total",
		Help: "Samples in the telemetry messages written to the log and acknowledged by the stream.",
	})
	l.seqGauge = prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: "genvelope", Name: "log_applied_sequence",
		Help: "The last stream sequence this replica has applied.",
	}, func() float64 { return float64(l.applied.Load()) })
	l.connected = prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: "genvelope", Name: "log_connected",
		Help: "1 while connected to NATS.",
	}, func() float64 { return b2f(l.nc.IsConnected()) })
	l.caughtUpGa = prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: "genvelope", Name: "log_caught_up",
		Help: "1 when this replica has applied the log up to its end.",
	}, func() float64 { return b2f(l.caughtUp.Load()) })
	l.behindGa = prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: "genvelope", Name: "log_pending_messages",
		Help: "Messages of the log (of the partitions served) not yet applied by this replica: its lag in messages.",
	}, func() float64 { return float64(l.behind.Load()) })
	l.lagGa = prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: "genvelope", Name: "log_lag_seconds",
		Help: "How far this replica is behind the log: the age of the last message it applied when it applied it, or the time since while it is stalled with messages pending; 0 when caught up.",
	}, func() float64 { return float64(l.lagNS.Load()) / 1e9 })
	l.tooFarGa = prometheus.NewGaugeFunc(prometheus.GaugeOpts{
		Namespace: "genvelope", Name: "log_behind",
		Help: "1 while this replica is too far behind the log to be ready (--nats-max-lag, --nats-max-lag-messages).",
	}, func() float64 { return b2f(l.tooFar.Load()) })
}

// Collectors returns the log's metrics.
func (l *Log) Collectors() []prometheus.Collector {
	return []prometheus.Collector{l.messages, l.pubFailed, l.restarts, l.writtenMsg, l.writtenSmp, l.seqGauge, l.connected, l.caughtUpGa, l.behindGa, l.lagGa, l.tooFarGa}
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}
