package durable

import (
	"context"
	"errors"
	"io"
	"log/slog"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/test/testenv"
)

// The example fleet's units, in partitions 5, 1 and 4 of 8, with a
// plausible P (MW) and V (kV) for each (390 MVA 20 kV, 13.8 kV, 15 kV).
var exampleUnits = []struct {
	id       string
	pMW, vKV float64
}{{"harrowmere-1", 200, 20.4}, {"larchwater-2", 80, 13.8}, {"brindle-gt3", 100, 15}}

// testLog is a Log attached to a store of the example fleet, applying a
// fresh stream of a nats-server of its own.
type testLog struct {
	*Log
	store *ingest.Store
	js    jetstream.JetStream // a second connection, the test's own
	base  time.Time

	natsPID int
}

// startNATSServer starts a JetStream node of its own on a free port and
// returns its URL and process id: $GENVELOPE_NATS_SERVER, or nats-server
// from PATH.
func startNATSServer(t testing.TB) (url string, pid int) {
	t.Helper()
	if testing.Short() {
		t.Skip("starts nats-server")
	}
	bin := os.Getenv("GENVELOPE_NATS_SERVER")
	if bin == "" {
		if tt, ok := t.(*testing.T); ok {
			bin = testenv.NeedTool(tt, "nats-server", "apt-get install nats-server")
		} else if bin, _ = exec.LookPath("nats-server"); bin == "" {
			t.Skip("nats-server not found on PATH: install it with `apt-get install nats-server`")
		}
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	ln.Close()
	host, port, _ := net.SplitHostPort(addr)
	ns := exec.Command(bin, "-js", "-sd", filepath.Join(t.TempDir(), "js"), "-a", host, "-p", port)
	if err := ns.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = ns.Process.Kill(); _ = ns.Wait() })
	return "nats://" + addr, ns.Process.Pid
}

// openBenchLog opens a Log on url, retrying while the server starts;
// cfg (may be nil) adjusts the configuration.
func openBenchLog(t testing.TB, url string, cfg ...func(*Config)) *Log {
	t.Helper()
	c := Config{URLs: []string{url}, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}
	for _, f := range cfg {
		f(&c)
	}
	for deadline := time.Now().Add(testenv.WaitLong); ; time.Sleep(50 * time.Millisecond) {
		l, err := Open(context.Background(), c)
		if err == nil {
			t.Cleanup(l.Close)
			return l
		}
		if time.Now().After(deadline) {
			t.Fatal(err)
		}
	}
}

func startTestLog(t *testing.T, cfg ...func(*Config)) *testLog {
	t.Helper()
	return startTestLogWith(t, nil, cfg...)
}

// startTestLogWith is startTestLog with prep (may be nil) called on the
// Log before it runs.
func startTestLogWith(t *testing.T, prep func(*Log), cfg ...func(*Config)) *testLog {
	t.Helper()
	url, pid := startNATSServer(t)
	l := openBenchLog(t, url, cfg...)
	if prep != nil {
		prep(l)
	}
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	store := ingest.NewStore(l.Select(fl), ingest.Options{})
	if err := l.Attach(context.Background(), store, nil); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- l.Run(ctx) }()
	t.Cleanup(func() {
		cancel()
		if err := <-done; err != nil {
			t.Error(err)
		}
	})
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	return &testLog{Log: l, store: store, js: js, base: time.Now().Add(-10 * time.Minute).Truncate(time.Second), natsPID: pid}
}

// sample returns a plausible sample of example unit u at base + k s.
func (tl *testLog) sample(u, k int) ingest.Sample {
	e := exampleUnits[u]
	return ingest.Sample{UnitID: e.id, Time: tl.base.Add(time.Duration(k) * time.Second), PMW: e.pMW, QMvar: 50, VKV: e.vKV}
}

// append writes smps and waits for the answer.
func (tl *testLog) append(t *testing.T, smps []ingest.Sample) ([]ingest.Result, error) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	wait, err := tl.Append(ctx, time.Now(), smps)
	if err != nil {
		return nil, err
	}
	res, _, err := wait(ctx)
	return res, err
}

// waitApplied waits until this replica has applied the stream to its
// end.
func (tl *testLog) waitApplied(t *testing.T) {
	t.Helper()
	for deadline := time.Now().Add(testenv.WaitLong); ; time.Sleep(10 * time.Millisecond) {
		info, err := tl.stream.Info(context.Background())
		if err != nil {
			t.Fatal(err)
		}
		if tl.Applied() >= info.State.LastSeq {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("applied %d of the stream's %d messages", tl.Applied(), info.State.LastSeq)
		}
	}
}

func (tl *testLog) ledger(id string) Ledger {
	tl.applyMu.Lock() // as a checkpoint takes it
	defer tl.applyMu.Unlock()
	if lg := tl.Log.ledger[id]; lg != nil {
		return Ledger{Count: lg.Count, Digest: lg.Digest}
	}
	return Ledger{}
}

// TestAppendAnswersByPlace: Append groups a batch's samples by
// partition (reordering them), and the answers come back in the batch's
// own order: each sample's, whatever its unit's partition and its place
// among the others (the consumer's verdicts: accepted, duplicate, out of
// order).
func TestAppendAnswersByPlace(t *testing.T) {
	tl := startTestLog(t)
	if _, err := tl.append(t, []ingest.Sample{tl.sample(0, 5), tl.sample(1, 5)}); err != nil {
		t.Fatal(err)
	}
	type place struct {
		u, k int
		want ingest.Result
	}
	batch := []place{
		{0, 6, ingest.Accepted}, {1, 5, ingest.Duplicate}, {2, 0, ingest.Accepted}, {0, 5, ingest.Duplicate},
		{1, 6, ingest.Accepted}, {2, 1, ingest.Accepted}, {0, 4, ingest.RejectOutOfOrder}, {2, 1, ingest.Duplicate},
	}
	smps := make([]ingest.Sample, len(batch))
	for i, b := range batch {
		smps[i] = tl.sample(b.u, b.k)
	}
	res, err := tl.append(t, smps)
	if err != nil {
		t.Fatal(err)
	}
	if len(res) != len(batch) {
		t.Fatalf("%d answers for %d samples", len(res), len(batch))
	}
	for i, b := range batch {
		if res[i] != b.want {
			t.Errorf("sample %d (%s at %d s): %v, want %v", i, exampleUnits[b.u].id, b.k, res[i], b.want)
		}
	}
}

// TestBatchAcknowledgedWhenEveryPartitionStored: a batch of three units
// in three partitions is three messages; it is acknowledged once all
// three are in the stream, and answered UNAVAILABLE when one of them is
// refused, though the others are stored. The resend of the whole batch
// then counts each sample once.
func TestBatchAcknowledgedWhenEveryPartitionStored(t *testing.T) {
	tl := startTestLog(t)
	batch := func(k0 int, perUnit [3]int) []ingest.Sample {
		var smps []ingest.Sample
		for u, n := range perUnit {
			for k := k0; k < k0+n; k++ {
				smps = append(smps, tl.sample(u, k))
			}
		}
		return smps
	}

	// Stored everywhere: acknowledged, and each partition's subject has
	// one message holding exactly its unit's samples.
	res, err := tl.append(t, batch(0, [3]int{2, 3, 1}))
	if err != nil {
		t.Fatalf("batch over three partitions: %v", err)
	}
	for i, r := range res {
		if r != ingest.Accepted {
			t.Errorf("sample %d: %v, want accepted", i, r)
		}
	}
	for u, n := range []int{2, 3, 1} {
		p := Partition(exampleUnits[u].id, tl.cfg.Partitions)
		m, err := tl.stream.GetLastMsgForSubject(context.Background(), tl.subject(p))
		if err != nil {
			t.Fatalf("partition %d of %s: %v", p, exampleUnits[u].id, err)
		}
		smps, err := testDecoder().decode(m.Header.Get(formatHeader), m.Data)
		if err != nil || len(smps) != n || smps[0].UnitID != exampleUnits[u].id {
			t.Errorf("partition %d holds %d samples (%v), want %d of %s", p, len(smps), err, n, exampleUnits[u].id)
		}
	}

	// The stream now refuses messages over 400 bytes: the batch's
	// message for the first unit (10 samples, some 40 bytes each) is
	// refused, those of the other two (one sample each) stored. The batch
	// is not acknowledged.
	cfg := tl.stream.CachedInfo().Config
	cfg.MaxMsgSize = 400
	if _, err := tl.js.UpdateStream(context.Background(), cfg); err != nil {
		t.Fatal(err)
	}
	second := batch(10, [3]int{10, 1, 1})
	before, _ := tl.stream.Info(context.Background())
	if _, err := tl.append(t, second); err == nil {
		t.Fatal("a batch with a partition's message refused by the stream was acknowledged")
	} else {
		t.Logf("refused: %v", err)
	}
	after, _ := tl.stream.Info(context.Background())
	if got := after.State.LastSeq - before.State.LastSeq; got != 2 {
		t.Errorf("%d messages stored of the refused batch, want the 2 within the limit", got)
	}

	// The client resends; the stream takes it all now. The two samples
	// already in the log are duplicates, the ten new ones accepted, and
	// every unit's ledger counts each sample once.
	cfg.MaxMsgSize = -1
	if _, err := tl.js.UpdateStream(context.Background(), cfg); err != nil {
		t.Fatal(err)
	}
	res, err = tl.append(t, second)
	if err != nil {
		t.Fatalf("resend: %v", err)
	}
	var counts [ingest.NumResults]int
	for _, r := range res {
		counts[r]++
	}
	if counts[ingest.Accepted] != 10 || counts[ingest.Duplicate] != 2 {
		t.Errorf("resend: %d accepted, %d duplicates; want 10 and 2", counts[ingest.Accepted], counts[ingest.Duplicate])
	}
	tl.waitApplied(t)
	for u, want := range []uint64{12, 4, 2} {
		if lg := tl.ledger(exampleUnits[u].id); lg.Count != want {
			t.Errorf("%s: %d samples applied, want %d", exampleUnits[u].id, lg.Count, want)
		}
	}
}

// TestBadTelemetryMessages: messages in the stream that genvelope cannot
// read (cut short, another version, another format, an index outside
// the id table) are logged, counted as foreign and skipped; a readable
// message naming a unit outside the fleet applies its good samples and
// rejects that unit's; the good message after them all, in samples/1,
// is applied.
func TestBadTelemetryMessages(t *testing.T) {
	tl := startTestLog(t)
	good := []ingest.Sample{tl.sample(0, 2), tl.sample(0, 3)}
	data := new(sampleEncoder).encodeSamples(nil, good, []int{0, 1})
	withByte := func(i int, v byte) []byte {
		c := append([]byte(nil), data...)
		c[i] = v
		return c
	}
	subj := tl.subject(Partition(good[0].UnitID, tl.cfg.Partitions))
	unknown := []ingest.Sample{tl.sample(0, 0), {UnitID: "no-such-unit", Time: tl.base, PMW: 1, VKV: 1}, tl.sample(0, 1)}
	for _, m := range []struct {
		name   string
		format string
		data   []byte
	}{
		{"cut short", formatSamples, data[:len(data)-3]},
		{"version 3", formatSamples, withByte(0, 3)},
		{"format samples/3", "samples/3", data},
		{"index outside the table", formatSamples, withByte(4+len(good[0].UnitID), 5)}, // version, id count, id length, id, sample count, the index
		{"a unit not in the fleet", formatSamples, new(sampleEncoder).encodeSamples(nil, unknown, []int{0, 1, 2})},
		{"good, in the older format", formatSamples1, encodeSamples1(nil, good, []int{0, 1})},
	} {
		msg := &nats.Msg{Subject: subj, Header: nats.Header{formatHeader: {m.format}}, Data: m.data}
		if _, err := tl.js.PublishMsg(context.Background(), msg); err != nil {
			t.Fatalf("%s: %v", m.name, err)
		}
	}
	tl.waitApplied(t)
	if got := testutil.ToFloat64(tl.messages.WithLabelValues("foreign")); got != 4 {
		t.Errorf("%v foreign messages counted, want 4", got)
	}
	if got := testutil.ToFloat64(tl.messages.WithLabelValues("applied")); got != 2 {
		t.Errorf("%v messages applied, want 2", got)
	}
	// harrowmere-1 at base+0 s and +1 s beside the unknown unit, then at
	// +2 s and +3 s.
	var want Ledger
	for k := range 4 {
		want.Count++
		want.Digest += SampleDigest(good[0].UnitID, tl.base.Add(time.Duration(k)*time.Second).UnixNano())
	}
	if lg := tl.ledger(good[0].UnitID); lg != want {
		t.Errorf("%s: ledger %+v, want its samples at +0 to +3 s, %+v", good[0].UnitID, lg, want)
	}
	if lg := tl.ledger("no-such-unit"); lg.Count != 0 {
		t.Errorf("a unit outside the fleet was applied: %+v", lg)
	}
	if n := tl.store.Counts()[ingest.RejectUnknownUnit]; n != 1 {
		t.Errorf("%d samples rejected as of an unknown unit, want 1", n)
	}
}

// TestPipelinedBatches: batches appended one after another without
// waiting, from one goroutine per unit, all go into the log in their
// order (any reordering would make a later sample of a unit come first
// and the earlier one out of order) and each sample counts once. The
// writers may put several batches in one message; the answer of each
// batch is its own samples'.
func TestPipelinedBatches(t *testing.T) {
	tl := startTestLog(t)
	const batches, per = 40, 3
	var wg sync.WaitGroup
	for u := range exampleUnits {
		wg.Add(1)
		go func() {
			defer wg.Done()
			ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
			defer cancel()
			var waits []func(context.Context) ([]ingest.Result, []string, error)
			for b := range batches {
				smps := make([]ingest.Sample, per)
				for k := range smps {
					smps[k] = tl.sample(u, b*per+k)
				}
				wait, err := tl.Append(ctx, time.Now(), smps)
				if err != nil {
					t.Errorf("%s batch %d: %v", exampleUnits[u].id, b, err)
					return
				}
				waits = append(waits, wait)
			}
			for b, wait := range waits {
				res, _, err := wait(ctx)
				if err != nil {
					t.Errorf("%s batch %d: %v", exampleUnits[u].id, b, err)
					continue
				}
				for k, r := range res {
					if r != ingest.Accepted {
						t.Errorf("%s batch %d sample %d: %v, want accepted", exampleUnits[u].id, b, k, r)
					}
				}
			}
		}()
	}
	wg.Wait()
	tl.waitApplied(t)
	for _, e := range exampleUnits {
		var want Ledger
		for k := range batches * per {
			want.Count++
			want.Digest += SampleDigest(e.id, tl.base.Add(time.Duration(k)*time.Second).UnixNano())
		}
		if lg := tl.ledger(e.id); lg != want {
			t.Errorf("%s: ledger %+v, want %+v", e.id, lg, want)
		}
	}
	msgs, smps := testutil.ToFloat64(tl.writtenMsg), testutil.ToFloat64(tl.writtenSmp)
	if smps != batches*per*float64(len(exampleUnits)) {
		t.Errorf("%v samples written, want %d", smps, batches*per*len(exampleUnits))
	}
	t.Logf("%d batches of one unit each went into %v messages", batches*len(exampleUnits), msgs)
}

// TestPartQueueTake: a writer takes at least one segment, then whole
// segments while they fit the message limit, in the order queued.
func TestPartQueueTake(t *testing.T) {
	q := &partQueue{}
	for _, size := range []int{300, 300, 500, 2000, 100} {
		q.pending = append(q.pending, &segment{boundBytes: size})
	}
	var got [][]int
	for segs := q.take(1000); len(segs) > 0; segs = q.take(1000) {
		var sizes []int
		for _, s := range segs {
			sizes = append(sizes, s.boundBytes)
		}
		got = append(got, sizes)
	}
	if want := [][]int{{300, 300}, {500}, {2000}, {100}}; !reflect.DeepEqual(got, want) {
		t.Errorf("messages of segment sizes %v, want %v", got, want)
	}
}

// TestAppendAfterClose: once the log is closed a batch is refused at
// once, and one queued but not yet written is answered with an error,
// never left waiting or acknowledged.
func TestAppendAfterClose(t *testing.T) {
	url, _ := startNATSServer(t)
	l := openBenchLog(t, url)
	// A queued segment the writer has not taken: queue it directly,
	// without waking the writer, then close.
	q := l.queues[0]
	seg := &segment{pub: make(chan error, 1)}
	q.mu.Lock()
	q.pending = append(q.pending, seg)
	q.mu.Unlock()
	l.Close()
	if err := <-seg.pub; !errors.Is(err, errClosed) {
		t.Errorf("a segment queued at close: %v, want %v", err, errClosed)
	}
	if _, err := l.Append(context.Background(), time.Now(), []ingest.Sample{{UnitID: "harrowmere-1"}}); !errors.Is(err, errClosed) {
		t.Errorf("Append after Close: %v, want %v", err, errClosed)
	}
}

// TestUnconfirmedWriteNotAcknowledged: while nats-server is stopped
// (SIGSTOP) a batch is not confirmed within the timeout and is answered
// with an error, never acknowledged; once the server runs again the
// resend is acknowledged and each sample counts once, whether or not the
// first write reached the stream in the end.
func TestUnconfirmedWriteNotAcknowledged(t *testing.T) {
	tl := startTestLog(t, func(c *Config) { c.Timeout = 300 * time.Millisecond })
	first := []ingest.Sample{tl.sample(0, 0), tl.sample(1, 0)}
	if _, err := tl.append(t, first); err != nil {
		t.Fatalf("first batch: %v", err)
	}
	if err := syscall.Kill(tl.natsPID, syscall.SIGSTOP); err != nil {
		t.Fatal(err)
	}
	stopped := true
	cont := func() {
		if stopped {
			stopped = false
			if err := syscall.Kill(tl.natsPID, syscall.SIGCONT); err != nil {
				t.Error(err)
			}
		}
	}
	defer cont()
	second := []ingest.Sample{tl.sample(0, 1), tl.sample(1, 1), tl.sample(2, 1)}
	if res, err := tl.append(t, second); err == nil {
		t.Fatalf("a batch written while nats-server was stopped was acknowledged: %v", res)
	} else {
		t.Logf("while stopped: %v", err)
	}
	cont()
	var res []ingest.Result
	for deadline := time.Now().Add(testenv.WaitLong); ; time.Sleep(100 * time.Millisecond) {
		var err error
		if res, err = tl.append(t, second); err == nil {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("resend: %v", err)
		}
	}
	for i, r := range res {
		if r != ingest.Accepted && r != ingest.Duplicate {
			t.Errorf("resend sample %d: %v", i, r)
		}
	}
	tl.waitApplied(t)
	for u, want := range []uint64{2, 2, 1} {
		if lg := tl.ledger(exampleUnits[u].id); lg.Count != want {
			t.Errorf("%s: %d samples applied, want %d", exampleUnits[u].id, lg.Count, want)
		}
	}
}
