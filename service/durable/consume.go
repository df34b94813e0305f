package durable

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/state"
)

func jsonMarshal(v any) ([]byte, error) { return json.Marshal(v) }

// Checkpoint is the checkpoint file: a replica's state and the stream
// sequence it includes. Version 2 (written since the binary state
// format) is this struct in JSON without State on the first line, then
// the state in the binary format of the state file (ingest.StateEncoder,
// with its own checksum); version 1, one JSON object with the state in
// it, is still read.
type Checkpoint struct {
	Format     string `json:"format"` // "genvelope-log-state"
	Version    int    `json:"version"`
	Stream     string `json:"stream"`
	Prefix     string `json:"prefix"`
	Partitions int    `json:"partitions"`
	Serves     string `json:"serves"`
	Sequence   uint64 `json:"stream_sequence"`              // the last message the state includes
	LastSweep  int64  `json:"last_sweep_unix_ns,omitempty"` // the latest time swept (Log.Sweep)
	// The journal's log position when the checkpoint was taken (its last
	// entry from the log, and how many entries that message made): a
	// journal found behind it at a restart has lost entries.
	JournalLogSeq     uint64             `json:"journal_log_sequence,omitempty"`
	JournalLogEntries uint64             `json:"journal_log_entries,omitempty"`
	Ledger            map[string]*Ledger `json:"ledger"`
	State             *ingest.Snapshot   `json:"state,omitempty"` // version 1 only; version 2 has it after the JSON line
}

const (
	checkpointFormat  = "genvelope-log-state"
	checkpointVersion = 2
)

// ReadCheckpoint reads a checkpoint file, of version 2 or 1.
func ReadCheckpoint(path string) (*Checkpoint, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, err
	}
	// Version 2: a JSON line, then the binary state. Version 1: the file
	// is one JSON object (on any number of lines).
	var cp Checkpoint
	head, rest, two := bytes.Cut(data, []byte("\n"))
	if !two || json.Unmarshal(head, &cp) != nil || cp.Version != checkpointVersion {
		cp = Checkpoint{}
		if err := json.Unmarshal(data, &cp); err != nil {
			return nil, fmt.Errorf("checkpoint %s is corrupt: %w", path, err)
		}
	}
	if cp.Format != checkpointFormat || cp.Version < 1 || cp.Version > checkpointVersion || (cp.Version == 1) != (cp.State != nil) {
		return nil, fmt.Errorf("checkpoint %s has format %q version %d; this genvelope reads %q versions 1 and %d",
			path, cp.Format, cp.Version, checkpointFormat, checkpointVersion)
	}
	if cp.Version == 1 {
		return &cp, nil
	}
	if cp.State, err = ingest.ReadSnapshot(bytes.NewReader(rest)); err != nil {
		return nil, fmt.Errorf("checkpoint %s is corrupt: %w", path, err)
	}
	return &cp, nil
}

// Attach restores the checkpoint into store (moving aside one that does
// not fit this stream) and prepares to apply the log from the next
// sequence. reload reads the fleet file again on this replica, at the
// time of the reload's message.
//
// The alarm journal (the store's) is written as each message is
// applied, with the message's sequence (journal.Entry.LogSeq), and is
// synced before every checkpoint is written: it is always at or beyond
// the checkpoint's sequence. Replaying the log from the checkpoint gives
// the journal entries of the messages after it again, and the journal
// skips those it has (journal.Journal.Append); so a restart neither
// duplicates nor loses an entry.
func (l *Log) Attach(ctx context.Context, store *ingest.Store, reload func(at time.Time) error) error {
	l.store, l.reload = store, reload
	ictx, cancel := context.WithTimeout(ctx, 4*l.cfg.Timeout)
	defer cancel()
	info, err := l.stream.Info(ictx)
	if err != nil {
		return fmt.Errorf("stream %s: %w", l.cfg.Stream, err)
	}
	l.lastSeq.Store(info.State.LastSeq)
	// A unit that never reported is silent from the stream's creation,
	// the same moment on every replica.
	store.SetStart(info.Created)
	if j := store.Journal(); j != nil {
		if seq, _ := j.LogPosition(); seq > info.State.LastSeq {
			l.log.Error("JOURNAL OF ANOTHER STREAM: the journal has entries up to log sequence beyond the stream's end; it takes every entry from this log",
				"journal_log_sequence", seq, "stream_last_sequence", info.State.LastSeq)
			j.ForgetLogPosition()
		} else if seq > 0 {
			l.log.Info("journal", "log_sequence", seq)
		}
	}
	if p := l.cfg.CheckpointPath; p != "" {
		cp, err := ReadCheckpoint(p)
		switch {
		case errors.Is(err, os.ErrNotExist):
			l.log.Info("no checkpoint yet; applying the whole log", "checkpoint", p)
		case err == nil && (cp.Stream != l.cfg.Stream || cp.Prefix != l.cfg.Prefix || cp.Partitions != l.cfg.Partitions ||
			cp.Serves != formatPartitions(l.serves)):
			err = fmt.Errorf("checkpoint %s is of stream %s, prefix %s, partitions %s of %d; this replica has %s, %s, %s of %d",
				p, cp.Stream, cp.Prefix, cp.Serves, cp.Partitions, l.cfg.Stream, l.cfg.Prefix, formatPartitions(l.serves), l.cfg.Partitions)
			fallthrough
		case err == nil && cp.Sequence > info.State.LastSeq:
			if err == nil {
				err = fmt.Errorf("checkpoint %s includes sequence %d but the stream ends at %d: the stream is not the one it was taken from",
					p, cp.Sequence, info.State.LastSeq)
			}
			fallthrough
		case err != nil:
			aside, rerr := state.MoveAside(p, time.Now())
			if rerr != nil && !errors.Is(rerr, os.ErrNotExist) {
				return fmt.Errorf("%v; and it could not be moved aside: %w", err, rerr)
			}
			l.log.Error("CHECKPOINT UNUSABLE: moved aside; the state is rebuilt from the whole log", "err", err, "moved_to", aside)
		default:
			restored, unknown, bad := store.Restore(cp.State)
			for _, b := range bad {
				l.log.Error("CHECKPOINT ENTRY UNUSABLE: not restored; this unit's state comes from the log alone", "checkpoint", p, "err", b)
			}
			l.seq = cp.Sequence
			if j := store.Journal(); j != nil {
				if seq, n := j.LogPosition(); seq < cp.JournalLogSeq || seq == cp.JournalLogSeq && n < cp.JournalLogEntries {
					l.log.Error("JOURNAL BEHIND THE CHECKPOINT: the journal has lost entries the checkpoint says it had (a power loss, or the file replaced); they are not in it",
						"journal_log_sequence", seq, "journal_log_entries", n,
						"checkpoint_journal_log_sequence", cp.JournalLogSeq, "checkpoint_journal_log_entries", cp.JournalLogEntries)
				}
			}
			if cp.LastSweep != 0 {
				l.lastSweep = time.Unix(0, cp.LastSweep)
			}
			for id, lg := range cp.Ledger {
				if lg != nil {
					l.ledger[id] = lg
				}
			}
			l.log.Info("checkpoint restored", "checkpoint", p, "stream_sequence", cp.Sequence, "units", restored, "not_in_fleet", len(unknown))
		}
	}
	if first := info.State.FirstSeq; info.State.Msgs > 0 && first > l.seq+1 {
		l.log.Error("LOG TRUNCATED: messages after the checkpoint are no longer in the stream (older than its max age); the state misses them",
			"checkpoint_sequence", l.seq, "stream_first_sequence", first)
	}
	l.applied.Store(l.seq)
	l.caughtUp.Store(l.seq >= info.State.LastSeq)
	return nil
}

// Run applies the log to the store until ctx is done, writing the
// checkpoint every CheckpointInterval and once more at the end. The
// server ends it after the last batch has been answered.
//
// The log is read through an ordered consumer, opened from the message
// after the last one applied. It is opened again, from there, when its
// iterator ends by itself, and when the watchdog (watch) finds it
// stalled: waiting for a message for stallAfter while the stream holds
// messages for this replica after the last applied. nats.go recreates an
// ordered consumer that misses heartbeats under the same name, retrying
// until it is made; after the loss of a cluster node that held it, that
// retry can go on for good (the creation of the same name is never
// answered), silently: the replica would go on acknowledging writes and
// never apply them. A consumer given up is stopped; what it still
// delivers is not applied (its generation is old).
func (l *Log) Run(ctx context.Context) error {
	var (
		consMu sync.Mutex
		cons   jetstream.Consumer // the current one, for pollLag
	)
	current := func() jetstream.Consumer {
		consMu.Lock()
		defer consMu.Unlock()
		return cons
	}
	// readers: the consumers and pollLag, which a consumer nats.go is
	// recreating can hold up for a while after ctx is done (see watch);
	// the final checkpoint does not wait for them.
	var wg, readers sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		l.keepCheckpoint(ctx)
	}()
	readers.Add(1)
	go func() {
		defer readers.Done()
		l.pollLag(ctx, current)
	}()
	for first := true; ctx.Err() == nil; first = false {
		c := l.openConsumer(ctx, first)
		if c == nil {
			break // ctx done
		}
		if l.wrapConsumer != nil {
			c = l.wrapConsumer(c)
		}
		consMu.Lock()
		cons = c
		consMu.Unlock()
		if info := c.CachedInfo(); first && info != nil && info.NumPending == 0 {
			l.caughtUp.Store(true)
		}
		l.applyMu.Lock()
		l.gen++
		r := &reader{gen: l.gen}
		l.applyMu.Unlock()
		r.waiting.Store(time.Now().UnixNano())
		cctx, cancel := context.WithCancel(ctx)
		ended := make(chan struct{})
		readers.Add(1)
		go func() {
			defer readers.Done()
			defer close(ended)
			l.consume(cctx, c, r)
		}()
		stalled := l.watch(cctx, r, ended)
		cancel()
		if stalled {
			l.restarts.Inc()
		}
	}
	wg.Wait()
	l.applyMu.Lock()
	l.gen++ // no consumer applies from here
	l.applyMu.Unlock()
	if err := l.writeCheckpoint(); err != nil {
		l.log.Error("final checkpoint not saved", "err", err)
	}
	readers.Wait()
	return nil
}

// reader is one consumer of the log: its generation, and since when it
// has been waiting for a message (Unix ns; 0 while applying one).
type reader struct {
	gen     uint64
	waiting atomic.Int64
}

// stallAfter is how long a consumer may wait for a message while the
// stream holds messages for this replica after the last applied before
// the watchdog gives it up and reads the log again from there.
const stallAfter = 3 * time.Second

// reopenWait bounds the wait for a consumer opened again (openConsumer).
const reopenWait = 2 * time.Second

// watch watches the consumer r until ctx is done or its iterator has
// ended (ended closed), once a lagPoll: it reports true once r has
// waited stallAfter for a message while the stream holds messages for
// this replica after the last one applied. Then the replica counts as
// stalled for readiness (noteStall) until it applies again. The stream
// is asked only after stallAfter without a message, so an idle log costs
// nothing; and it answers only once the stream has a leader, so the
// consumer is given up within a few seconds of the cluster having one
// again.
func (l *Log) watch(ctx context.Context, r *reader, ended <-chan struct{}) bool {
	t := time.NewTicker(lagPoll)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return false
		case <-ended:
			return false
		case <-t.C:
		}
		since := r.waiting.Load()
		if since == 0 || time.Since(time.Unix(0, since)) < stallAfter {
			continue
		}
		// A short wait: while the stream has no leader nobody answers, and
		// the next tick asks again.
		pending, err := l.pendingForUs(ctx, 2*lagPoll)
		if err != nil || pending == 0 {
			continue // the log unreachable (Ready says so when disconnected), or idle
		}
		now := time.Now()
		l.noteStall(now, pending)
		l.log.Warn("the log's consumer delivers nothing while the log holds messages for this replica: reading the log again after the last message applied",
			"stream_sequence", l.applied.Load(), "pending_at_most", pending, "waiting", now.Sub(time.Unix(0, since)).Round(time.Millisecond))
		return true
	}
}

// pendingForUs asks the stream how many messages it holds after the last
// one applied (at most: of the partitions served, when this replica
// reads only those, it is 0 or the count of the stream's).
func (l *Log) pendingForUs(ctx context.Context, timeout time.Duration) (uint64, error) {
	ictx, cancel := context.WithTimeout(ctx, timeout)
	defer cancel()
	info, err := l.stream.Info(ictx)
	if err != nil {
		return 0, err
	}
	last, applied := info.State.LastSeq, l.applied.Load()
	if last > l.lastSeq.Load() {
		l.lastSeq.Store(last)
	}
	if last <= applied {
		return 0, nil
	}
	filter := l.filterSubjects()
	if len(filter) == 0 {
		return last - applied, nil
	}
	for _, subj := range filter {
		_, err := l.stream.GetMsg(ictx, applied+1, jetstream.WithGetMsgSubject(subj))
		switch {
		case err == nil:
			return last - applied, nil
		case !errors.Is(err, jetstream.ErrMsgNotFound):
			return 0, err
		}
	}
	return 0, nil
}

// filterSubjects returns the subjects this replica reads: those of the
// partitions it serves and of the operator actions; none (the whole
// stream) when it serves every partition, or when the server takes one
// filter only (older than 2.10: it then reads every partition and skips
// those of others).
func (l *Log) filterSubjects() []string {
	all := true
	for _, s := range l.serves {
		all = all && s
	}
	if all || !serverAtLeast(l.nc.ConnectedServerVersion(), 2, 10) {
		return nil
	}
	var subjs []string
	for p, s := range l.serves {
		if s {
			subjs = append(subjs, l.subject(p))
		}
	}
	return append(subjs, l.cfg.Prefix+".ops")
}

// openConsumer makes an ordered consumer of the log from the message
// after the last one applied, retrying every second; nil once ctx is
// done. The first waits Timeout for the server's answer; the next ones,
// after the loss of a node, reopenWait: the cluster may place the new
// consumer on the lost node, which never answers, and each attempt
// (with a new name) is placed again.
func (l *Log) openConsumer(ctx context.Context, first bool) jetstream.Consumer {
	cfg := jetstream.OrderedConsumerConfig{DeliverPolicy: jetstream.DeliverAllPolicy, FilterSubjects: l.filterSubjects()}
	if seq := l.applied.Load(); seq > 0 {
		cfg.DeliverPolicy, cfg.OptStartSeq = jetstream.DeliverByStartSequencePolicy, seq+1
	}
	wait := l.cfg.Timeout
	if !first {
		wait = min(wait, reopenWait)
	}
	for {
		ictx, cancel := context.WithTimeout(ctx, wait)
		cons, err := l.stream.OrderedConsumer(ictx, cfg)
		cancel()
		if err == nil {
			return cons
		}
		if ctx.Err() != nil {
			return nil
		}
		l.log.Error("cannot read the log; retrying", "stream", l.cfg.Stream, "err", err)
		// Meanwhile the replica applies nothing: while the stream holds
		// messages for it, it is stalled for readiness.
		if pending, err := l.pendingForUs(ctx, lagPoll); err == nil && pending > 0 {
			l.noteStall(time.Now(), pending)
		}
		select {
		case <-ctx.Done():
			return nil
		case <-time.After(time.Second):
		}
	}
}

// consume applies what cons delivers until ctx is done or its iterator
// ends, noting in r while it waits for a message.
func (l *Log) consume(ctx context.Context, cons jetstream.Consumer, r *reader) {
	it, err := cons.Messages()
	if err != nil {
		l.log.Error("cannot read the log; retrying", "stream", l.cfg.Stream, "err", err)
		select {
		case <-ctx.Done():
		case <-time.After(time.Second):
		}
		return
	}
	stop := context.AfterFunc(ctx, it.Stop)
	defer stop()
	defer it.Stop()
	for {
		r.waiting.Store(time.Now().UnixNano())
		msg, err := it.Next()
		r.waiting.Store(0)
		if err != nil {
			if ctx.Err() != nil {
				return
			}
			if errors.Is(err, jetstream.ErrMsgIteratorClosed) {
				l.log.Warn("the log's consumer ended; reading the log again after the last message applied", "stream_sequence", l.applied.Load())
				return
			}
			l.log.Warn("reading the log", "err", err)
			continue
		}
		l.waitPaused(ctx)
		if !l.apply(msg, r.gen) {
			return // given up by the watchdog
		}
	}
}

// serverAtLeast reports whether a NATS server version "2.10.3" is at
// least major.minor.
func serverAtLeast(v string, major, minor int) bool {
	parts := strings.SplitN(strings.TrimPrefix(v, "v"), ".", 3)
	if len(parts) < 2 {
		return false
	}
	a, err1 := strconv.Atoi(parts[0])
	b, err2 := strconv.Atoi(parts[1])
	return err1 == nil && err2 == nil && (a > major || a == major && b >= minor)
}

// apply applies one message of the log, delivered by the consumer of
// generation gen; false when that consumer has been given up (the
// message is not applied: the current consumer delivers it).
func (l *Log) apply(msg jetstream.Msg, gen uint64) bool {
	meta, err := msg.Metadata()
	if err != nil {
		l.log.Warn("log message without metadata: skipped", "subject", msg.Subject(), "err", err)
		l.messages.WithLabelValues("foreign").Inc()
		return true
	}
	l.applyMu.Lock()
	defer l.applyMu.Unlock()
	if gen != l.gen {
		return false
	}
	seq := meta.Sequence.Stream
	if seq <= l.seq {
		return true // already applied
	}
	result := "applied"
	l.store.SetLogSequence(seq)
	err = l.applyMsg(msg, meta)
	l.store.SetLogSequence(0)
	if err != nil {
		result = "foreign"
		if errors.Is(err, errOtherPartition) {
			result = "other_partition"
		} else {
			l.log.Warn("foreign message in the log: skipped", "stream_sequence", seq, "subject", msg.Subject(), "err", err)
		}
	}
	l.messages.WithLabelValues(result).Inc()
	l.seq = seq
	l.applied.Store(seq)
	if seq > l.lastSeq.Load() {
		l.lastSeq.Store(seq)
	}
	if meta.NumPending == 0 {
		l.caughtUp.Store(true)
	}
	l.noteApplied(time.Now(), meta)
	return true
}

var errOtherPartition = errors.New("a partition served by another replica")

// applyMsg applies a telemetry message or an operator action. l.applyMu
// must be held.
func (l *Log) applyMsg(msg jetstream.Msg, meta *jetstream.MsgMetadata) error {
	subj := msg.Subject()
	format := msg.Headers().Get(formatHeader)
	rest, ok := strings.CutPrefix(subj, l.cfg.Prefix+".")
	if !ok {
		return fmt.Errorf("subject %s is not under %s", subj, l.cfg.Prefix)
	}
	var w *waiter
	if id := msg.Headers().Get(idHeader); id != "" {
		l.mu.Lock()
		w = l.pending[id]
		l.mu.Unlock()
	}
	switch {
	case rest == "ops":
		if format != formatOp {
			return fmt.Errorf("%s %q is not %q", formatHeader, format, formatOp)
		}
		o, err := decodeOp(msg.Data())
		if err != nil {
			return err
		}
		if d := time.Unix(0, o.AtUnixNS).Sub(meta.Timestamp); o.Op == "sweep" && (d > maxSweepSkew || d < -maxSweepSkew) {
			// A sweep far from when it was written would expire shelves
			// or age every unit by its own clock: not one of ours.
			return fmt.Errorf("sweep at %s, %s from when the log stored it", time.Unix(0, o.AtUnixNS).UTC().Format(time.RFC3339), d.Round(time.Second))
		}
		err = l.applyOp(o)
		if w != nil {
			w.err = err
			close(w.done)
		}
		return nil
	case strings.HasPrefix(rest, "telemetry."):
		p, err := strconv.Atoi(strings.TrimPrefix(rest, "telemetry."))
		if err != nil || p < 0 || p >= l.cfg.Partitions {
			return fmt.Errorf("subject %s names no partition of 0-%d", subj, l.cfg.Partitions-1)
		}
		if format != formatSamples && format != formatSamples1 {
			return fmt.Errorf("%s %q is not %q", formatHeader, format, formatSamples)
		}
		if !l.serves[p] {
			return errOtherPartition
		}
		smps, err := l.dec.decode(format, msg.Data())
		if err != nil {
			return err
		}
		if w != nil && len(w.results) != len(smps) {
			w = nil // not ours after all
		}
		l.applySamples(&l.units[p], meta.Timestamp, smps, w)
		if w != nil {
			// Its batches hold the waiter; the writer registered it.
			l.forget([]string{msg.Headers().Get(idHeader)})
		}
		return nil
	}
	return fmt.Errorf("subject %s is neither telemetry nor operator actions", subj)
}

// internID returns the id for b, without allocating for a unit of the
// fleet.
func (l *Log) internID(b []byte) string {
	if id, ok := l.intern[string(b)]; ok {
		return id
	}
	id := string(b)
	if l.store.Unit(id) != nil {
		l.intern[id] = id
	}
	return id
}

// applySamples applies the decoded samples of a partition whose units
// resolves, received at the stream's time at. l.applyMu must be held.
func (l *Log) applySamples(units *ingest.Resolver, at time.Time, smps []ingest.Sample, w *waiter) {
	var tally ingest.Tally
	// With an id table (samples/2), each unit's ledger is looked up once
	// a message rather than once a sample.
	refs := l.dec.refs
	if len(refs) != len(smps) {
		refs = nil
	}
	l.ledgers = l.ledgers[:0]
	for range l.dec.ids {
		l.ledgers = append(l.ledgers, nil)
	}
	for i := range smps {
		smp := &smps[i]
		res, detail := l.store.AcceptFrom(units, at, smp)
		tally[res]++
		if res == ingest.Accepted {
			var lg *Ledger
			if refs != nil {
				lg = l.ledgers[refs[i]]
			}
			if lg == nil {
				if lg = l.ledger[smp.UnitID]; lg == nil {
					lg = &Ledger{}
					l.ledger[smp.UnitID] = lg
				}
				if refs != nil {
					l.ledgers[refs[i]] = lg
				}
			}
			lg.add(smp.UnitID, smp.Time.UnixNano())
		}
		if w != nil {
			w.results[i], w.details[i] = res, detail
		}
	}
	l.store.Commit(&tally)
	if w != nil {
		close(w.done)
	}
}

// applyOp applies an operator action at its own time. l.applyMu must be
// held.
func (l *Log) applyOp(o op) error {
	at := time.Unix(0, o.AtUnixNS)
	switch o.Op {
	case "reload":
		if l.reload == nil {
			return nil
		}
		return l.reload(at)
	case "sweep":
		l.sweep(at)
		return nil
	}
	if l.store.Unit(o.Unit) == nil {
		return fmt.Errorf("%w %q", ingest.ErrUnknownUnit, ingest.ClipID(o.Unit))
	}
	switch o.Op {
	case "reset":
		return l.store.ResetThermal(o.Unit, o.Winding, at, o.By, o.Reason)
	case "discard":
		return l.store.DiscardSample(o.Unit, time.Unix(0, o.SampleUnixNS), at, o.By, o.Reason)
	}
	k, ok := alarm.ParseKind(o.Alarm)
	if !ok {
		return fmt.Errorf("operator action on unknown alarm %q", o.Alarm)
	}
	if o.Op == "acknowledge" {
		return l.store.Acknowledge(o.Unit, k, at, o.By)
	}
	var until time.Time
	if o.UntilUnixNS != 0 {
		until = time.Unix(0, o.UntilUnixNS)
	}
	return l.store.Shelve(o.Unit, k, until, at, o.By)
}

// maxSweepSkew is how far a sweep's time may be from the time the log
// stored it (the clocks of the replica that wrote it and of the NATS
// servers); beyond, the message is foreign.
const maxSweepSkew = time.Minute

// sweep runs the store's wall-clock supervision at at, or at the latest
// time swept when at is earlier (replicas' clocks differ): its time
// never goes back. l.applyMu must be held.
func (l *Log) sweep(at time.Time) {
	if at.Before(l.lastSweep) {
		at = l.lastSweep
	}
	l.lastSweep = at
	l.store.Sweep(at)
	l.sweptAt.Store(time.Now().UnixNano())
}

// encodeCheckpoint writes the checkpoint (version 2) to w: taken under
// the lock the consumer holds while it applies a message, so the state
// covers a whole number of messages, and the sequence with it.
func (l *Log) encodeCheckpoint(w io.Writer) error {
	l.applyMu.Lock()
	defer l.applyMu.Unlock()
	cp := &Checkpoint{Format: checkpointFormat, Version: checkpointVersion, Stream: l.cfg.Stream, Prefix: l.cfg.Prefix,
		Partitions: l.cfg.Partitions, Serves: formatPartitions(l.serves), Sequence: l.seq, Ledger: l.ledger}
	if !l.lastSweep.IsZero() {
		cp.LastSweep = l.lastSweep.UnixNano()
	}
	if j := l.store.Journal(); j != nil {
		cp.JournalLogSeq, cp.JournalLogEntries = j.LogPosition()
	}
	head, err := json.Marshal(cp)
	if err != nil {
		return err
	}
	if _, err := w.Write(append(head, '\n')); err != nil {
		return err
	}
	return l.store.EncodeState(w, time.Now())
}

// writeCheckpoint encodes the checkpoint into a buffer kept from one
// checkpoint to the next (the consumer waits only for the encoding) and
// replaces the file with it.
func (l *Log) writeCheckpoint() error {
	if l.cfg.CheckpointPath == "" {
		return nil
	}
	l.cpMu.Lock()
	defer l.cpMu.Unlock()
	l.cpBuf.Reset()
	if err := l.encodeCheckpoint(&l.cpBuf); err != nil {
		return err
	}
	// The journal's entries of the messages the checkpoint includes were
	// written before it was taken: made durable first, the journal is
	// never behind the checkpoint (see Attach).
	if err := l.store.SyncJournal(); err != nil {
		return fmt.Errorf("journal not synced, so no checkpoint beyond it is written: %w", err)
	}
	return state.WriteFile(l.cfg.CheckpointPath, l.cpBuf.Bytes())
}

func (l *Log) keepCheckpoint(ctx context.Context) {
	if l.cfg.CheckpointPath == "" {
		return
	}
	t := time.NewTicker(l.cfg.CheckpointInterval)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
			if err := l.writeCheckpoint(); err != nil {
				l.log.Error("checkpoint not saved", "err", err)
			}
		}
	}
}
