package durable

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"strconv"
	"strings"
	"sync"
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
	Format     string             `json:"format"` // "genvelope-log-state"
	Version    int                `json:"version"`
	Stream     string             `json:"stream"`
	Prefix     string             `json:"prefix"`
	Partitions int                `json:"partitions"`
	Serves     string             `json:"serves"`
	Sequence   uint64             `json:"stream_sequence"` // the last message the state includes
	Ledger     map[string]*Ledger `json:"ledger"`
	State      *ingest.Snapshot   `json:"state,omitempty"`
}

const (
	checkpointFormat  = "genvelope-log-state"
	checkpointVersion = 2
)

// ReadCheckpoint reads a checkpoint file, of version 2 or 1.
func ReadCheckpoint(path string) (*Checkpoint, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	r := bufio.NewReaderSize(f, 64<<10)
	line, err := r.ReadBytes('\n') // version 1 has no newline: the line is the file
	if err != nil && !errors.Is(err, io.EOF) {
		return nil, err
	}
	var cp Checkpoint
	if err := json.Unmarshal(line, &cp); err != nil {
		return nil, fmt.Errorf("checkpoint %s is corrupt: %w", path, err)
	}
	if cp.Format != checkpointFormat || cp.Version < 1 || cp.Version > checkpointVersion || (cp.Version == 1) != (cp.State != nil) {
		return nil, fmt.Errorf("checkpoint %s has format %q version %d; this genvelope reads %q versions 1 and %d",
			path, cp.Format, cp.Version, checkpointFormat, checkpointVersion)
	}
	if cp.Version == 1 {
		return &cp, nil
	}
	if cp.State, err = ingest.ReadSnapshot(r); err != nil {
		return nil, fmt.Errorf("checkpoint %s is corrupt: %w", path, err)
	}
	return &cp, nil
}

// Attach restores the checkpoint into store (moving aside one that does
// not fit this stream) and prepares to apply the log from the next
// sequence. reload reads the fleet file again on this replica.
func (l *Log) Attach(ctx context.Context, store *ingest.Store, reload func() error) error {
	l.store, l.reload = store, reload
	ictx, cancel := context.WithTimeout(ctx, 4*l.cfg.Timeout)
	defer cancel()
	info, err := l.stream.Info(ictx)
	if err != nil {
		return fmt.Errorf("stream %s: %w", l.cfg.Stream, err)
	}
	l.lastSeq.Store(info.State.LastSeq)
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
			aside := fmt.Sprintf("%s.bad-%s", p, time.Now().UTC().Format("20060102T150405Z"))
			if rerr := os.Rename(p, aside); rerr != nil && !errors.Is(rerr, os.ErrNotExist) {
				return fmt.Errorf("%v; and it could not be moved aside: %w", err, rerr)
			}
			l.log.Error("CHECKPOINT UNUSABLE: moved aside; the state is rebuilt from the whole log", "err", err, "moved_to", aside)
		default:
			restored, unknown, bad := store.Restore(cp.State)
			for _, b := range bad {
				l.log.Error("CHECKPOINT ENTRY UNUSABLE: not restored; this unit's state comes from the log alone", "checkpoint", p, "err", b)
			}
			l.seq = cp.Sequence
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
func (l *Log) Run(ctx context.Context) error {
	cfg := jetstream.OrderedConsumerConfig{DeliverPolicy: jetstream.DeliverAllPolicy}
	if l.seq > 0 {
		cfg.DeliverPolicy, cfg.OptStartSeq = jetstream.DeliverByStartSequencePolicy, l.seq+1
	}
	all := true
	for _, s := range l.serves {
		all = all && s
	}
	if !all && serverAtLeast(l.nc.ConnectedServerVersion(), 2, 10) {
		// Only the partitions served, and the operator actions; older
		// servers take one filter only, so this replica reads every
		// partition and skips those of others.
		for p, s := range l.serves {
			if s {
				cfg.FilterSubjects = append(cfg.FilterSubjects, l.subject(p))
			}
		}
		cfg.FilterSubjects = append(cfg.FilterSubjects, l.cfg.Prefix+".ops")
	}
	var cons jetstream.Consumer
	for {
		var err error
		if cons, err = l.stream.OrderedConsumer(ctx, cfg); err == nil {
			break
		}
		l.log.Error("cannot read the log; retrying", "stream", l.cfg.Stream, "err", err)
		select {
		case <-ctx.Done():
			return nil
		case <-time.After(time.Second):
		}
	}
	if info := cons.CachedInfo(); info != nil && info.NumPending == 0 {
		l.caughtUp.Store(true)
	}
	it, err := cons.Messages()
	if err != nil {
		return fmt.Errorf("reading stream %s: %w", l.cfg.Stream, err)
	}
	stop := context.AfterFunc(ctx, it.Stop)
	defer stop()
	defer it.Stop()

	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		l.keepCheckpoint(ctx)
	}()
	for {
		msg, err := it.Next()
		if err != nil {
			if ctx.Err() != nil || errors.Is(err, jetstream.ErrMsgIteratorClosed) {
				break
			}
			l.log.Warn("reading the log", "err", err)
			continue
		}
		l.apply(msg)
	}
	wg.Wait()
	if err := l.writeCheckpoint(); err != nil {
		l.log.Error("final checkpoint not saved", "err", err)
	}
	return nil
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

// apply applies one message of the log.
func (l *Log) apply(msg jetstream.Msg) {
	meta, err := msg.Metadata()
	if err != nil {
		l.log.Warn("log message without metadata: skipped", "subject", msg.Subject(), "err", err)
		l.messages.WithLabelValues("foreign").Inc()
		return
	}
	l.applyMu.Lock()
	defer l.applyMu.Unlock()
	seq := meta.Sequence.Stream
	if seq <= l.seq {
		return // already applied
	}
	result := "applied"
	if err := l.applyMsg(msg, meta); err != nil {
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
	l.behind.Store(meta.NumPending)
	if meta.NumPending == 0 {
		l.caughtUp.Store(true)
	}
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
		if format != formatSamples {
			return fmt.Errorf("%s %q is not %q", formatHeader, format, formatSamples)
		}
		if !l.serves[p] {
			return errOtherPartition
		}
		l.buf, err = decodeSamples(msg.Data(), l.buf, l.internID)
		if err != nil {
			return err
		}
		if w != nil && len(w.results) != len(l.buf) {
			w = nil // not ours after all
		}
		l.applySamples(meta.Timestamp, w)
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

// applySamples applies the decoded samples, received at the stream's
// time at. l.applyMu must be held.
func (l *Log) applySamples(at time.Time, w *waiter) {
	var tally ingest.Tally
	for i := range l.buf {
		smp := &l.buf[i]
		res, detail := l.store.Accept(at, smp)
		tally[res]++
		if res == ingest.Accepted {
			lg := l.ledger[smp.UnitID]
			if lg == nil {
				lg = &Ledger{}
				l.ledger[smp.UnitID] = lg
			}
			lg.Count++
			lg.Digest += SampleDigest(smp.UnitID, smp.Time.UnixNano())
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

// applyOp applies an operator action at its own time.
func (l *Log) applyOp(o op) error {
	at := time.Unix(0, o.AtUnixNS)
	if o.Op == "reload" {
		if l.reload == nil {
			return nil
		}
		return l.reload()
	}
	k, ok := alarm.ParseKind(o.Alarm)
	if !ok {
		return fmt.Errorf("operator action on unknown alarm %q", o.Alarm)
	}
	if l.store.Unit(o.Unit) == nil {
		return fmt.Errorf("%w %q", ingest.ErrUnknownUnit, o.Unit)
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

// encodeCheckpoint writes the checkpoint (version 2) to w: taken under
// the lock the consumer holds while it applies a message, so the state
// covers a whole number of messages, and the sequence with it.
func (l *Log) encodeCheckpoint(w io.Writer) error {
	l.applyMu.Lock()
	defer l.applyMu.Unlock()
	cp := &Checkpoint{Format: checkpointFormat, Version: checkpointVersion, Stream: l.cfg.Stream, Prefix: l.cfg.Prefix,
		Partitions: l.cfg.Partitions, Serves: formatPartitions(l.serves), Sequence: l.seq, Ledger: l.ledger}
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
