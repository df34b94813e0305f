package bounds

import (
	"bytes"
	"context"
	"fmt"
	"net"
	"path/filepath"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/test/testenv"
)

// rawCodec sends and receives bytes as they are.
type rawCodec struct{}

func (rawCodec) Marshal(v any) (mem.BufferSlice, error) {
	return mem.BufferSlice{mem.SliceBuffer(v.([]byte))}, nil
}

func (rawCodec) Unmarshal(data mem.BufferSlice, v any) error {
	*(v.(*[]byte)) = data.Materialize()
	return nil
}

func (rawCodec) Name() string { return "proto" }

// memoryBound is what the service may reach at its peak under each
// test: the documented resident size for 10,000 units, far above the
// three-unit example fleet's need.
const memoryBound = 256 << 20

type svc struct {
	proc       *testenv.Proc
	grpc, http string
	conn       *grpc.ClientConn
}

func start(t *testing.T) *svc {
	t.Helper()
	if testing.Short() {
		t.Skip("bounded-resource test: skipped under -short")
	}
	root := testenv.ModuleRoot(t)
	dir := t.TempDir()
	bin := testenv.BuildGenvelope(t, root, dir)
	s := &svc{grpc: testenv.Addr(testenv.FreePort(t)), http: testenv.Addr(testenv.FreePort(t))}
	s.proc = testenv.StartProc(t, "genvelope", bin, "serve", "--fleet", filepath.Join(root, "deploy", "examples", "fleet.yaml"),
		"--grpc-listen", s.grpc, "--http-listen", s.http, "--state", "", "--journal", "")
	s.proc.WaitHTTP(t, "http://"+s.http+"/readyz")
	var err error
	s.conn, err = grpc.NewClient(s.grpc, grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithDefaultCallOptions(grpc.MaxCallSendMsgSize(128<<20)))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s.conn.Close() })
	return s
}

func (s *svc) hwm(t *testing.T, what string) {
	t.Helper()
	h := testenv.VmHWM(s.proc.PID())
	t.Logf("%s: service VmHWM %.1f MiB (bound %d MiB)", what, float64(h)/(1<<20), memoryBound>>20)
	if h == 0 {
		t.Log("VmHWM not readable here: memory not checked")
		return
	}
	if h > memoryBound {
		t.Errorf("%s: VmHWM %d MiB, more than %d MiB", what, h>>20, memoryBound>>20)
	}
}

// push sends one batch of n samples of harrowmere-1 and checks every one
// is answered.
func (s *svc) push(t *testing.T, ctx context.Context, seq uint64, at time.Time, n int, flip bool) {
	t.Helper()
	req := &pb.PushRequest{Sequence: seq}
	for i := range n {
		q := 100.0
		if flip && i%2 == 1 {
			q = 260 // beyond the field limit and back: alarm traffic
		}
		req.Samples = append(req.Samples, &pb.Sample{UnitId: "harrowmere-1", Time: timestamppb.New(at.Add(time.Duration(i) * time.Millisecond)), PMw: 300, QMvar: q, VKv: 20.4})
	}
	resp, err := pb.NewTelemetryServiceClient(s.conn).Push(ctx, req)
	if err != nil {
		s.proc.Failf(t, "push beside the load: %v", err)
	}
	if got := int(resp.Accepted+resp.Duplicates) + len(resp.Rejected); got != n {
		t.Fatalf("push: %d answers for %d samples", got, n)
	}
}

// A 63 MB request of tiny samples is refused before it is decoded
// (RESOURCE_EXHAUSTED, the receive size is matched to the batch limit);
// a 1 MB unit id is not echoed back; memory stays bounded.
func TestLargeRequestBounded(t *testing.T) {
	s := start(t)
	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	// The request as bytes: samples = 2, each {unit_id = 1: "x"}, 5
	// bytes a sample (building it as messages costs the client minutes).
	one := []byte{0x12, 0x03, 0x0a, 0x01, 'x'}
	big := bytes.Repeat(one, (63<<20)/len(one))
	t.Logf("request: %d samples, %.1f MB", len(big)/len(one), float64(len(big))/1e6)
	for i := range 2 {
		var out []byte
		err := s.conn.Invoke(ctx, pb.TelemetryService_Push_FullMethodName, big, &out, grpc.ForceCodecV2(rawCodec{}))
		if status.Code(err) != codes.ResourceExhausted {
			t.Fatalf("push %d of the 63 MB request: %v, want RESOURCE_EXHAUSTED", i+1, err)
		}
	}
	// Bytes that are not a PushRequest: INVALID_ARGUMENT, not INTERNAL.
	var out []byte
	if err := s.conn.Invoke(ctx, pb.TelemetryService_Push_FullMethodName, []byte{0x12, 0xff, 0xff, 0xff}, &out, grpc.ForceCodecV2(rawCodec{})); status.Code(err) != codes.InvalidArgument {
		t.Errorf("malformed protobuf: %v, want INVALID_ARGUMENT", err)
	}
	tel := pb.NewTelemetryServiceClient(s.conn)
	big = nil
	id := make([]byte, 1<<20)
	for i := range id {
		id[i] = 'u'
	}
	resp, err := tel.Push(ctx, &pb.PushRequest{Sequence: 2, Samples: []*pb.Sample{{UnitId: string(id), Time: timestamppb.Now(), PMw: 1, QMvar: 1, VKv: 1}}})
	if err != nil {
		t.Fatalf("push with a 1 MB unit id: %v", err)
	}
	if n := proto.Size(resp); n > 512 {
		t.Errorf("the answer to a 1 MB unit id is %d bytes: the id is echoed", n)
	} else {
		t.Logf("answer to a 1 MB unit id: %d bytes", n)
	}
	s.push(t, ctx, 3, time.Now().Add(-time.Minute), 1000, false)
	s.hwm(t, "after two 63 MB requests")
}

// 4,000 alarm watchers that never read: 16 (the cap per caller) are
// served, the rest refused with RESOURCE_EXHAUSTED; alarm traffic and
// ingest beside them are answered; memory stays bounded.
func TestIdleWatchersBounded(t *testing.T) {
	s := start(t)
	ctx, cancel := context.WithTimeout(context.Background(), 3*testenv.WaitLong)
	defer cancel()
	const watchers, conns = 4000, 16
	var cs []*grpc.ClientConn
	for range conns {
		c, err := grpc.NewClient(s.grpc, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close()
		cs = append(cs, c)
	}
	var served, refused, other atomic.Int64
	var wg sync.WaitGroup
	sem := make(chan struct{}, 256)
	for i := range watchers {
		wg.Add(1)
		sem <- struct{}{}
		go func() {
			defer wg.Done()
			defer func() { <-sem }()
			st, err := pb.NewAlarmServiceClient(cs[i%conns]).WatchAlarms(ctx, &pb.WatchAlarmsRequest{})
			if err != nil {
				other.Add(1)
				return
			}
			md, err := st.Header()
			switch {
			case err == nil && md != nil:
				served.Add(1) // and never read
			default:
				if _, err := st.Recv(); status.Code(err) == codes.ResourceExhausted {
					refused.Add(1)
				} else {
					other.Add(1)
				}
			}
		}()
	}
	wg.Wait()
	t.Logf("%d watchers: %d served, %d refused, %d other", watchers, served.Load(), refused.Load(), other.Load())
	if served.Load() != 16 || refused.Load() != watchers-16 {
		t.Errorf("served %d, refused %d; want 16 and %d", served.Load(), refused.Load(), watchers-16)
	}
	// Alarm traffic while the 16 never read: 200 batches of field-limit
	// crossings; each is answered.
	at := time.Now().Add(-time.Hour)
	began := time.Now()
	const batches, per = 200, 500
	for b := range batches {
		s.push(t, ctx, uint64(b+1), at.Add(time.Duration(b)*time.Second), per, true)
	}
	t.Logf("ingest beside the watchers: %.0f samples/s (noisy on a shared machine; not asserted)", float64(batches*per)/time.Since(began).Seconds())
	s.hwm(t, "after 4,000 watchers and alarm traffic")
}

// 1,000 slow HTTP bodies from one address: the listener holds at most
// its cap of connections (128), of which 32 for one client (the rest are
// answered 429 and closed at their first request), closes each slow one
// at the read timeout, and gRPC ingest is answered all the while; memory
// stays bounded.
func TestSlowHTTPBodiesBounded(t *testing.T) {
	s := start(t)
	ctx, cancel := context.WithTimeout(context.Background(), 3*testenv.WaitLong)
	defer cancel()
	const slow = 1000
	var held []net.Conn
	for range slow {
		c, err := net.Dial("tcp", s.http)
		if err != nil {
			t.Fatalf("dial: %v", err)
		}
		held = append(held, c)
		fmt.Fprintf(c, "POST /units/harrowmere-1/alarms/field/acknowledge HTTP/1.1\r\nHost: 127.0.0.1\r\n"+
			"Content-Type: application/x-www-form-urlencoded\r\nContent-Length: 1000000\r\n\r\noperator=x")
	}
	defer func() {
		for _, c := range held {
			c.Close()
		}
	}()
	// gRPC ingest beside them.
	at := time.Now().Add(-time.Hour)
	for b := range 20 {
		s.push(t, ctx, uint64(b+1), at.Add(time.Duration(b)*time.Second), 500, false)
	}
	// The server closes the slow connections it took at its read timeout
	// (30 s); the rest are taken and closed in turn.
	began := time.Now()
	buf := make([]byte, 1)
	for i, c := range held[:10] {
		c.SetReadDeadline(time.Now().Add(2 * testenv.WaitLong))
		if _, err := c.Read(buf); err != nil {
			if ne, ok := err.(net.Error); ok && ne.Timeout() {
				t.Errorf("slow connection %d was never closed by the server", i)
			}
		}
	}
	t.Logf("the first 10 slow connections were closed by the server after %.0f s", time.Since(began).Seconds())
	s.hwm(t, "with 1,000 slow HTTP bodies")
}
