package replay

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
)

// waitLong bounds every wait: generous, since nothing is asserted about
// speed, only that things happen.
const waitLong = 60 * time.Second

// startServer runs a server over the example fleet on loopback until the
// test ends.
func startServer(t *testing.T) *server.Server {
	t.Helper()
	dir := t.TempDir()
	path := filepath.Join(dir, "fleet.yaml")
	if err := os.WriteFile(path, examples.FleetYAML(), 0o644); err != nil {
		t.Fatal(err)
	}
	srv, err := server.New(server.Config{FleetPath: path, GRPCListen: "127.0.0.1:0", HTTPListen: "127.0.0.1:0",
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- srv.Run(ctx) }()
	t.Cleanup(func() {
		cancel()
		select {
		case <-done:
		case <-time.After(waitLong):
			t.Errorf("server did not stop within %s", waitLong)
		}
	})
	return srv
}

func writeCSV(t *testing.T, content string) string {
	t.Helper()
	path := filepath.Join(t.TempDir(), "telemetry.csv")
	if err := os.WriteFile(path, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

func ctxT(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	t.Cleanup(cancel)
	return ctx
}

func stamp(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }

// A file with rows of every kind, in small batches so that the server's
// rejections come from several batches: exact counts, and every
// rejection and bad row on its own line with its reason.
func TestReplayCounts(t *testing.T) {
	srv := startServer(t)
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	at := func(s int) string { return stamp(t0.Add(time.Duration(s) * time.Second)) }
	rows := []string{
		"unit,time,p_mw,q_mvar,v_kv,field_a,quality,coolant",                // 1
		"harrowmere-1," + at(0) + ",300,120,20.4,,good,310",                 // 2 accepted
		"larchwater-2," + at(0) + ",80,20,13.8,,,",                          // 3 accepted
		"harrowmere-1," + at(1) + ",abc,120,20.4,,,",                        // 4 bad number
		"harrowmere-1," + at(1) + ",300,NaN,20.4,,,",                        // 5 NaN
		"harrowmere-1,yesterday,300,120,20.4,,,",                            // 6 bad time
		"harrowmere-1," + at(1) + ",300,120",                                // 7 wrong column count
		"," + at(1) + ",300,120,20.4,,,",                                    // 8 no unit
		"harrowmere-1," + at(1) + ",300,120,,,,",                            // 9 no voltage
		"nowhere-9," + at(1) + ",10,1,13.8,,,",                              // 10 unknown unit
		"harrowmere-1," + at(4) + ",301,118,20.4,,,",                        // 11 accepted
		"harrowmere-1," + at(2) + ",300,120,20.4,,,",                        // 12 out of order
		"brindle-gt3," + stamp(time.Now().Add(time.Hour)) + ",100,30,15,,,", // 13 future
		"brindle-gt3," + at(4) + ",100,30,15,,questionable,",                // 14 accepted
		"larchwater-2," + at(0) + ",80,20,13.8,,,",                          // 15 duplicate of 3
		"larchwater-2," + at(3) + ",80,20,13.8,,bogus,",                     // 16 bad quality
		"larchwater-2," + at(3) + ",80,20,13.8,,invalid,",                   // 17 invalid quality
	}
	path := writeCSV(t, strings.Join(rows, "\n")+"\n")
	r, err := New(Config{Target: srv.GRPCAddr(), File: path, Batch: 3})
	if err != nil {
		t.Fatal(err)
	}
	sum, err := r.Run(ctxT(t))
	if err != nil {
		t.Fatal(err)
	}
	if sum.Rows != 16 || sum.Accepted != 4 || sum.Duplicates != 1 || !sum.Complete || sum.Unanswered != 0 {
		t.Errorf("summary %+v; want 16 rows, 4 accepted, 1 duplicate, complete", sum)
	}
	wantRej := []struct {
		line   int
		reason string
	}{{10, "unknown_unit"}, {12, "out_of_order"}, {13, "future"}, {17, "invalid_quality"}}
	if len(sum.Rejected) != len(wantRej) {
		t.Fatalf("rejected %+v, want %d", sum.Rejected, len(wantRej))
	}
	for i, w := range wantRej {
		if got := sum.Rejected[i]; got.Line != w.line || got.Reason != w.reason || got.Detail == "" {
			t.Errorf("rejection %d: %+v, want line %d %s with a detail", i, got, w.line, w.reason)
		}
	}
	wantBad := []int{4, 5, 6, 7, 8, 9, 16}
	if len(sum.Bad) != len(wantBad) {
		t.Fatalf("bad rows %+v, want lines %v", sum.Bad, wantBad)
	}
	for i, l := range wantBad {
		if sum.Bad[i].Line != l {
			t.Errorf("bad row %d on line %d, want %d", i, sum.Bad[i].Line, l)
		}
	}
	if sum.OK() {
		t.Error("OK with rejections and bad rows")
	}
	c := srv.Store().Counts()
	if c[ingest.Accepted] != 4 || c[ingest.Duplicate] != 1 || c[ingest.RejectUnknownUnit] != 1 || c[ingest.RejectOutOfOrder] != 1 ||
		c[ingest.RejectFuture] != 1 || c[ingest.RejectInvalidQuality] != 1 {
		t.Errorf("server counts %v", c)
	}

	var out strings.Builder
	sum.Write(&out)
	for _, w := range []string{
		"16 rows: 4 accepted, 1 duplicate, 4 rejected, 7 not readable",
		"(1 future, 1 invalid_quality, 1 out_of_order, 1 unknown_unit)",
		path + `:10: unit "nowhere-9": unknown_unit:`,
		path + `:12: unit "harrowmere-1": out_of_order:`,
		path + ":4: p_mw: \"abc\" is not a number",
		path + ":7: has 4 field(s), the header has 8",
	} {
		if !strings.Contains(out.String(), w) {
			t.Errorf("summary does not say %q:\n%s", w, out.String())
		}
	}
}

// goodFile writes a file of n timestamps of each of the example's three
// units, one second apart, ending an hour ago.
func goodFile(t *testing.T, n int) (string, int) {
	t.Helper()
	t0 := time.Now().Add(-time.Hour - time.Duration(n)*time.Second).Truncate(time.Millisecond)
	var b strings.Builder
	b.WriteString("time,unit,p_mw,q_mvar,v_kv,field_a\n")
	for i := range n {
		at := stamp(t0.Add(time.Duration(i) * time.Second))
		fmt.Fprintf(&b, "%s,harrowmere-1,%.1f,%.1f,20.2,2900\n", at, 250+float64(i%50), 80+float64(i%7))
		fmt.Fprintf(&b, "%s,larchwater-2,%.1f,15,13.8,\n", at, 60+float64(i%20))
		fmt.Fprintf(&b, "%s,brindle-gt3,110,%.1f,15.1,\n", at, 30+float64(i%11))
	}
	return writeCSV(t, b.String()), 3 * n
}

// cutProxy forwards loopback TCP connections to target, and cuts the
// connection in use (both ways) each time the bytes through it in one
// direction pass one of that direction's cut points: towards the server
// (a batch lost on the way) or towards the client (the answer lost, after
// the server has taken the batch). Later connections go through.
type cutProxy struct {
	ln     net.Listener
	target string
	cuts   [2][]int64 // increasing byte counts: [0] towards the server, [1] towards the client
	bytes  [2]atomic.Int64
	cutN   [2]atomic.Int32

	mu    sync.Mutex
	conns []net.Conn
	wg    sync.WaitGroup
}

const (
	toServer = 0
	toClient = 1
)

func newCutProxy(t *testing.T, target string, up, down []int64) *cutProxy {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	p := &cutProxy{ln: ln, target: target, cuts: [2][]int64{up, down}}
	p.wg.Add(1)
	go p.accept()
	t.Cleanup(p.close)
	return p
}

func (p *cutProxy) addr() string { return p.ln.Addr().String() }

func (p *cutProxy) cutsDone() int { return int(p.cutN[toServer].Load() + p.cutN[toClient].Load()) }

func (p *cutProxy) accept() {
	defer p.wg.Done()
	for {
		c, err := p.ln.Accept()
		if err != nil {
			return
		}
		up, err := net.DialTimeout("tcp", p.target, 10*time.Second)
		if err != nil {
			c.Close()
			continue
		}
		p.mu.Lock()
		p.conns = append(p.conns, c, up)
		p.mu.Unlock()
		cut := func() { c.Close(); up.Close() }
		p.wg.Add(2)
		go func() { defer p.wg.Done(); p.pipe(up, c, toServer, cut) }()
		go func() { defer p.wg.Done(); p.pipe(c, up, toClient, cut) }()
	}
}

// pipe copies from src to dst until either fails, or until the bytes of
// direction dir pass its next cut point.
func (p *cutProxy) pipe(dst, src net.Conn, dir int, cut func()) {
	defer cut()
	buf := make([]byte, 4096)
	for {
		n, err := src.Read(buf)
		if n > 0 {
			if _, werr := dst.Write(buf[:n]); werr != nil {
				return
			}
			total := p.bytes[dir].Add(int64(n))
			if i := int(p.cutN[dir].Load()); i < len(p.cuts[dir]) && total >= p.cuts[dir][i] {
				p.cutN[dir].Add(1)
				return
			}
		}
		if err != nil {
			return
		}
	}
}

func (p *cutProxy) close() {
	p.ln.Close()
	p.mu.Lock()
	for _, c := range p.conns {
		c.Close()
	}
	p.mu.Unlock()
	p.wg.Wait()
}

// The connection is cut three times in the middle of the file, once on
// the way to the server and twice on the way back (answers lost after
// the server took the batches): the replay reconnects, resends what was
// not acknowledged and completes. The server accepted each row exactly
// once, answered the resent ones it had as duplicates, and the summary
// counts each row once.
func TestReplayResumesAfterCut(t *testing.T) {
	srv := startServer(t)
	path, n := goodFile(t, 1000)
	fi, err := os.Stat(path)
	if err != nil {
		t.Fatal(err)
	}
	// The samples on the wire take about as many bytes as the CSV: cut
	// the requests at half of it. An answer with its framing takes some
	// 20 bytes, and the file makes 60 batches: cut the answers after 300
	// and 600 bytes, some way into the file.
	proxy := newCutProxy(t, srv.GRPCAddr(), []int64{fi.Size() / 2}, []int64{300, 600})
	r, err := New(Config{Target: proxy.addr(), File: path, Batch: 50, Backoff: 50 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	sum, err := r.Run(ctxT(t))
	if err != nil {
		t.Fatalf("replay: %v (summary %+v)", err, sum)
	}
	if got := proxy.cutsDone(); got != 3 {
		t.Fatalf("the proxy cut %d times, want 3 (%d bytes to the server, %d back)", got, proxy.bytes[toServer].Load(), proxy.bytes[toClient].Load())
	}
	if sum.Reconnects < 3 {
		t.Errorf("%d reconnects, want at least 3", sum.Reconnects)
	}
	if !sum.OK() || sum.Rows != n || sum.Accepted+sum.Duplicates != n {
		t.Errorf("summary %+v; want all %d rows accepted or duplicate, each once", sum, n)
	}
	c := srv.Store().Counts()
	if c[ingest.Accepted] != uint64(n) {
		t.Errorf("server accepted %d samples, want each of the %d rows exactly once", c[ingest.Accepted], n)
	}
	if c[ingest.Duplicate] != uint64(sum.Duplicates) {
		t.Errorf("server counted %d duplicates, the summary %d", c[ingest.Duplicate], sum.Duplicates)
	}
	for res, k := range c {
		if res > int(ingest.Duplicate) && k > 0 {
			t.Errorf("server rejected %d samples as %s", k, ingest.Result(res))
		}
	}
	t.Logf("cut three times: %d reconnects, %d batches resent, %d duplicates", sum.Reconnects, sum.Resent, sum.Duplicates)
}

// A replay stopped part way (its context cancelled) and run again over
// the same file: the second run completes, the rows of the first come
// back as duplicates, and the server holds each row once.
func TestReplayInterruptedAndRerun(t *testing.T) {
	srv := startServer(t)
	path, n := goodFile(t, 200) // within the server's 256 remembered times per unit
	ctx, cancel := context.WithCancel(ctxT(t))
	defer cancel()
	r1, err := New(Config{Target: srv.GRPCAddr(), File: path, Batch: 20, Speed: 100})
	if err != nil {
		t.Fatal(err)
	}
	go func() {
		for ctx.Err() == nil && r1.Progress().Answered < n/4 {
			time.Sleep(5 * time.Millisecond)
		}
		cancel()
	}()
	sum1, err := r1.Run(ctx)
	if !errors.Is(err, context.Canceled) {
		t.Fatalf("first run: %v, want it cancelled part way (summary %+v)", err, sum1)
	}
	if sum1.Complete || sum1.Accepted == 0 || sum1.Accepted >= n {
		t.Fatalf("first run %+v; want it stopped part way", sum1)
	}

	r2, err := New(Config{Target: srv.GRPCAddr(), File: path, Batch: 20})
	if err != nil {
		t.Fatal(err)
	}
	sum2, err := r2.Run(ctxT(t))
	if err != nil {
		t.Fatal(err)
	}
	c := srv.Store().Counts()
	if !sum2.OK() || sum2.Accepted+sum2.Duplicates != n || c[ingest.Accepted] != uint64(n) {
		t.Errorf("second run %+v, server accepted %d; want every one of %d rows accepted once", sum2, c[ingest.Accepted], n)
	}
	if sum2.Duplicates < sum1.Accepted {
		t.Errorf("second run: %d duplicates, fewer than the %d rows the first run had accepted", sum2.Duplicates, sum1.Accepted)
	}
}

// A target that never answers: the replay gives up after its retries,
// says why, and counts the rows it had read as unanswered.
func TestReplayGivesUp(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	ln.Close() // nothing listens there now
	path, _ := goodFile(t, 5)
	r, err := New(Config{Target: addr, File: path, Batch: 5, Retries: 2, Backoff: 10 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	sum, err := r.Run(ctxT(t))
	if err == nil || !strings.Contains(err.Error(), "failed 3 times in a row") {
		t.Fatalf("error %v, want the stream to have failed 3 times in a row", err)
	}
	if sum.Complete || sum.OK() || sum.Accepted != 0 || sum.Unanswered == 0 {
		t.Errorf("summary %+v; want incomplete with rows unanswered", sum)
	}
}
