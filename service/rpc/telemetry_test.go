package rpc_test

import (
	"context"
	"io"
	"log/slog"
	"math"
	"net"
	"os"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/rpc"
)

const waitLong = 60 * time.Second

func exampleStore(t testing.TB) *ingest.Store {
	t.Helper()
	return ingest.NewStore(exampleFleet(t), ingest.Options{})
}

// exampleFleet parses the example fleet file.
func exampleFleet(t testing.TB) *fleet.Fleet {
	t.Helper()
	data, err := os.ReadFile("../../deploy/examples/fleet.yaml")
	if err != nil {
		t.Fatal(err)
	}
	fl, ds := fleet.Parse("fleet.yaml", data)
	if ds.HasErrors() {
		t.Fatalf("example fleet: %v", ds)
	}
	return fl
}

// hooked wraps the server side of a stream so that a test can stop it at
// a known point: after the n-th message is received, or as the n-th
// response is about to be sent. RecvMsg runs only on the service's
// receiving goroutine and SendMsg only on its answering one, so each
// counter has one goroutine.
type hooked struct {
	grpc.ServerStream
	afterRecv  func(n int)
	beforeSend func(n int)
	nr, ns     int
}

func (h *hooked) RecvMsg(m any) error {
	err := h.ServerStream.RecvMsg(m)
	if err == nil && h.afterRecv != nil {
		h.nr++
		h.afterRecv(h.nr)
	}
	return err
}

func (h *hooked) SendMsg(m any) error {
	if h.beforeSend != nil {
		h.ns++
		h.beforeSend(h.ns)
	}
	return h.ServerStream.SendMsg(m)
}

// drainServer is a TelemetryService on a loopback port whose streams are
// hooked, with the drain channel in the test's hand.
type drainServer struct {
	store    *ingest.Store
	draining chan struct{}
	ended    chan error // what each stream handler returned
	client   pb.TelemetryServiceClient
}

func newDrainServer(t *testing.T, afterRecv, beforeSend func(n int)) *drainServer {
	t.Helper()
	d := &drainServer{store: exampleStore(t), draining: make(chan struct{}), ended: make(chan error, 8)}
	gs := grpc.NewServer(grpc.StreamInterceptor(func(srv any, ss grpc.ServerStream, _ *grpc.StreamServerInfo, h grpc.StreamHandler) error {
		err := h(srv, &hooked{ServerStream: ss, afterRecv: afterRecv, beforeSend: beforeSend})
		d.ended <- err
		return err
	}))
	pb.RegisterTelemetryServiceServer(gs, rpc.NewTelemetry(d.store, rpc.TelemetryOptions{Draining: d.draining}))
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	go func() { _ = gs.Serve(ln) }()
	conn, err := grpc.NewClient(ln.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close(); gs.Stop() })
	d.client = pb.NewTelemetryServiceClient(conn)
	return d
}

func wait[T any](t *testing.T, ch <-chan T, what string) T {
	t.Helper()
	select {
	case v := <-ch:
		return v
	case <-time.After(waitLong):
		t.Fatalf("no %s within %s", what, waitLong)
		var zero T
		return zero
	}
}

func batch(seq uint64, at time.Time, n int) *pb.PushRequest {
	req := &pb.PushRequest{Sequence: seq}
	for i := range n {
		req.Samples = append(req.Samples, &pb.Sample{UnitId: "larchwater-2",
			Time: timestamppb.New(at.Add(time.Duration(i) * time.Millisecond)), PMw: 80, QMvar: 10, VKv: 13.8})
	}
	return req
}

// A drain that begins while the answer to a batch is being sent lets
// the answer out, then ends the stream with UNAVAILABLE.
func TestDrainAnswersBatchInHand(t *testing.T) {
	sending, release := make(chan struct{}), make(chan struct{})
	d := newDrainServer(t, nil, func(n int) {
		if n == 1 {
			close(sending)
			<-release
		}
	})
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	st, err := d.client.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(batch(1, time.Now().Add(-time.Hour), 5)); err != nil {
		t.Fatal(err)
	}
	wait(t, sending, "answer under way")
	close(d.draining)
	close(release)
	resp, err := st.Recv()
	if err != nil || resp.Sequence != 1 || resp.Accepted != 5 {
		t.Fatalf("batch in hand at the drain: %v, %v; want it answered, 5 accepted", resp, err)
	}
	if _, err := st.Recv(); status.Code(err) != codes.Unavailable {
		t.Fatalf("after the answer: %v, want UNAVAILABLE", err)
	}
	if err := wait(t, d.ended, "end of the stream handler"); status.Code(err) != codes.Unavailable {
		t.Errorf("handler returned %v, want UNAVAILABLE", err)
	}
}

// A drain that begins after a batch has come off the wire but before
// the service has started on it may end the stream without answering
// that batch; the batch must then not have been applied either, so that
// the client's resend of everything unacknowledged takes it exactly once.
func TestDrainUnansweredBatchIsNotApplied(t *testing.T) {
	got2, release := make(chan struct{}), make(chan struct{})
	d := newDrainServer(t, func(n int) {
		if n == 2 {
			close(got2)
			<-release
		}
	}, nil)
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	st, err := d.client.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-time.Hour)
	if err := st.Send(batch(1, t0, 3)); err != nil {
		t.Fatal(err)
	}
	if resp, err := st.Recv(); err != nil || resp.Accepted != 3 {
		t.Fatalf("batch 1: %v, %v", resp, err)
	}
	if err := st.Send(batch(2, t0.Add(time.Second), 3)); err != nil {
		t.Fatal(err)
	}
	wait(t, got2, "batch 2 received")
	close(d.draining)
	err = wait(t, d.ended, "end of the stream handler")
	close(release)
	if status.Code(err) != codes.Unavailable {
		t.Fatalf("handler returned %v, want UNAVAILABLE", err)
	}
	if resp, err := st.Recv(); status.Code(err) != codes.Unavailable {
		t.Fatalf("client got %v, %v; want UNAVAILABLE and no answer to batch 2", resp, err)
	}
	if c := d.store.Counts(); c[ingest.Accepted] != 3 {
		t.Fatalf("%d samples applied; batch 2 was not answered and must not have been applied", c[ingest.Accepted])
	}
}

// A drain with the stream idle ends it with UNAVAILABLE at once.
func TestDrainIdleStream(t *testing.T) {
	d := newDrainServer(t, nil, nil)
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	st, err := d.client.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&pb.PushRequest{Sequence: 4}); err != nil {
		t.Fatal(err)
	}
	if resp, err := st.Recv(); err != nil || resp.Sequence != 4 {
		t.Fatalf("empty batch: %v, %v", resp, err)
	}
	close(d.draining)
	if _, err := st.Recv(); status.Code(err) != codes.Unavailable {
		t.Fatalf("idle stream: %v, want UNAVAILABLE", err)
	}
}

// FuzzPushSamples sends a batch of arbitrary field values through the
// sample path (proto conversion, the rights check of a writer granted
// one site, the store) and checks that every sample gets exactly one
// answer, that samples for other units are refused (as unknown units),
// and that the store's counts and latest samples stay consistent.
func FuzzPushSamples(f *testing.F) {
	f.Add("harrowmere-1", int64(1_700_000_000), int32(0), 300.0, 120.0, 20.4, 1500.0, 50.0, 310.0, int32(1), true)
	f.Add("larchwater-2", int64(-62135596801), int32(-1), math.NaN(), math.Inf(1), -1.0, 0.0, 0.0, 0.0, int32(9), false)
	f.Add("", int64(253402300800), int32(1e9), 1e308, -1e308, 5e-324, math.Copysign(0, -1), 1e6, -1e6, int32(-3), true)
	fl := exampleFleet(f)
	f.Fuzz(func(t *testing.T, unit string, sec int64, nanos int32, p, q, v, ifd, hz, cool float64, quality int32, optional bool) {
		store := ingest.NewStore(fl, ingest.Options{})
		policy, err := access.Parse([]byte("identities: [{name: gw, grants: [{role: telemetry_writer, sites: [harrowmere]}]}]"))
		if err != nil {
			t.Fatal(err)
		}
		g, err := access.NewGuard(access.Options{Policy: policy, SiteOf: func(id string) (string, bool) {
			u := store.Fleet().Unit(id)
			if u == nil {
				return "", false
			}
			return u.Site, true
		}, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
		if err != nil {
			t.Fatal(err)
		}
		ctx := access.NewContext(context.Background(), g.Named("gw", "fuzz"))
		tel := rpc.NewTelemetry(store, rpc.TelemetryOptions{Now: func() time.Time { return time.Unix(1_700_000_100, 0) }})
		mk := func(id string) *pb.Sample {
			s := &pb.Sample{UnitId: id, Time: &timestamppb.Timestamp{Seconds: sec, Nanos: nanos}, PMw: p, QMvar: q, VKv: v, Quality: pb.Quality(quality)}
			if optional {
				s.FieldA, s.FrequencyHz, s.Coolant = &ifd, &hz, &cool
			}
			return s
		}
		req := &pb.PushRequest{Sequence: 7, Samples: []*pb.Sample{mk(unit), mk("harrowmere-1"), mk("larchwater-2")}}
		resp, err := tel.Push(ctx, req)
		if err != nil {
			t.Fatalf("Push: %v", err)
		}
		n := int(resp.Accepted+resp.Duplicates) + len(resp.Rejected)
		if n != len(req.Samples) {
			t.Fatalf("%d answers for %d samples: %v", n, len(req.Samples), resp)
		}
		seen := map[uint32]bool{}
		for _, r := range resp.Rejected {
			if int(r.Index) >= len(req.Samples) || seen[r.Index] || r.Reason == pb.RejectReason_REJECT_REASON_UNSPECIFIED || len(r.Detail) > 512 {
				t.Fatalf("bad rejection %v", r)
			}
			seen[r.Index] = true
		}
		if !seen[2] {
			t.Fatal("a sample for larchwater-2 (site larchwater) was not refused")
		}
		var total uint64
		for _, c := range store.Counts() {
			total += c
		}
		if total != uint64(len(req.Samples)) {
			t.Fatalf("store counted %d samples, sent %d", total, len(req.Samples))
		}
		for _, u := range store.Units() {
			vw := u.View()
			if vw.HasSample && (math.IsNaN(vw.Latest.PMW) || math.IsInf(vw.Latest.QMvar, 0) || vw.Latest.VKV <= 0) {
				t.Fatalf("unit %s kept a bad latest sample %+v", vw.Config.ID, vw.Latest)
			}
		}
	})
}
