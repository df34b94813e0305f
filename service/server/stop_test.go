package server_test

import (
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
)

// Cancelling Run's context with a stream open and a batch in flight:
// the batch is answered, the stream then ends with UNAVAILABLE, and Run
// returns nil.
func TestGracefulStop(t *testing.T) {
	r := start(t, server.Config{})
	ctx := ctxT(t)
	st, err := r.tel.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Now().Add(-time.Hour)
	// A first batch, answered, so that the stream is surely open.
	if err := st.Send(&pb.PushRequest{Sequence: 1, Samples: []*pb.Sample{sample("larchwater-2", t0, 80, 10, 13.8)}}); err != nil {
		t.Fatal(err)
	}
	if resp, err := st.Recv(); err != nil || resp.Sequence != 1 || resp.Accepted != 1 {
		t.Fatalf("first batch: %v, %v", resp, err)
	}

	// A large batch; once the server is seen taking its samples it is in
	// flight (or already answered), and the stop must not lose its answer.
	big := &pb.PushRequest{Sequence: 2}
	for i := range 10000 {
		big.Samples = append(big.Samples, sample("harrowmere-1", t0.Add(time.Duration(i+1)*time.Millisecond), 250, 40, 20))
	}
	if err := st.Send(big); err != nil {
		t.Fatal(err)
	}
	u := r.srv.Store().Unit("harrowmere-1")
	deadline := time.Now().Add(waitLong)
	for u.View().Accepted == 0 {
		if time.Now().After(deadline) {
			t.Fatalf("the server did not start on the batch within %s", waitLong)
		}
		time.Sleep(time.Millisecond)
	}
	// The store's totals are committed when a batch is done: 1 means the
	// big batch was still being taken at the stop.
	inFlight := r.srv.Store().Counts()[ingest.Accepted] == 1
	r.cancel()
	t.Logf("batch still being taken when the stop began: %v", inFlight)

	resp, err := st.Recv()
	if err != nil || resp.Sequence != 2 || resp.Accepted != 10000 {
		t.Fatalf("in-flight batch: %v, %v; want it answered with 10000 accepted", resp, err)
	}
	if _, err := st.Recv(); status.Code(err) != codes.Unavailable {
		t.Fatalf("after the in-flight batch the stream ended with %v, want UNAVAILABLE", err)
	}
	if err := r.stop(t); err != nil {
		t.Fatalf("Run returned %v, want nil", err)
	}
	if c := r.srv.Store().Counts(); c[ingest.Accepted] != 10001 {
		t.Errorf("%d samples accepted, want 10001", c[ingest.Accepted])
	}
	// Stopped means stopped: a new call fails.
	if _, err := r.fleet.ListUnits(ctx, &pb.ListUnitsRequest{}); status.Code(err) != codes.Unavailable {
		t.Errorf("ListUnits after the stop: %v, want UNAVAILABLE", err)
	}
}

// An idle open stream does not hold up a stop: it ends with UNAVAILABLE
// and Run returns nil.
func TestGracefulStopIdleStream(t *testing.T) {
	r := start(t, server.Config{})
	ctx := ctxT(t)
	st, err := r.tel.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&pb.PushRequest{Sequence: 9}); err != nil {
		t.Fatal(err)
	}
	if resp, err := st.Recv(); err != nil || resp.Sequence != 9 {
		t.Fatalf("empty batch: %v, %v", resp, err)
	}
	r.cancel()
	if _, err := st.Recv(); status.Code(err) != codes.Unavailable {
		t.Fatalf("idle stream ended with %v, want UNAVAILABLE", err)
	}
	if err := r.stop(t); err != nil {
		t.Fatalf("Run returned %v, want nil", err)
	}
}
