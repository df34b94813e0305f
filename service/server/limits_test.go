package server_test

import (
	"context"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/server"
)

// The per-caller caps: open calls up to the cap are served, the next is
// refused with RESOURCE_EXHAUSTED, and closing one makes room again.
func TestCallerCaps(t *testing.T) {
	for _, tc := range []struct {
		name   string
		limits server.Limits
		open   func(ctx context.Context, conn *grpc.ClientConn) (grpc.ClientStream, error)
	}{
		{"telemetry streams", server.Limits{InFlightPerCaller: 3}, func(ctx context.Context, conn *grpc.ClientConn) (grpc.ClientStream, error) {
			st, err := pb.NewTelemetryServiceClient(conn).Stream(ctx)
			if err != nil {
				return nil, err
			}
			// A batch answered means the call is open on the server.
			if err := st.Send(&pb.PushRequest{Sequence: 1}); err != nil {
				return nil, err
			}
			_, err = st.Recv()
			return st, err
		}},
		{"alarm watchers", server.Limits{WatchersPerCaller: 3}, func(ctx context.Context, conn *grpc.ClientConn) (grpc.ClientStream, error) {
			st, err := pb.NewAlarmServiceClient(conn).WatchAlarms(ctx, &pb.WatchAlarmsRequest{})
			if err != nil {
				return nil, err
			}
			if md, err := st.Header(); err != nil || md == nil {
				_, err = st.Recv()
				return nil, err
			}
			return st, nil
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := start(t, server.Config{Limits: tc.limits})
			var cancels []context.CancelFunc
			defer func() {
				for _, c := range cancels {
					c()
				}
			}()
			open := func() error {
				ctx, cancel := context.WithTimeout(context.Background(), waitLong)
				cancels = append(cancels, cancel)
				_, err := tc.open(ctx, r.conn)
				return err
			}
			for i := range 3 {
				if err := open(); err != nil {
					t.Fatalf("call %d within the cap of 3: %v", i+1, err)
				}
			}
			if err := open(); status.Code(err) != codes.ResourceExhausted {
				t.Fatalf("call 4 over the cap of 3: %v, want RESOURCE_EXHAUSTED", err)
			}
			cancels[0]() // close the first; the server counts it off when its handler ends
			waitFor(t, "room for a call after one closed", func() bool { return open() == nil })
		})
	}
}

// A telemetry stream without a batch for StreamIdle is ended with
// UNAVAILABLE (the client reconnects when it has telemetry).
func TestIdleTelemetryStreamEnded(t *testing.T) {
	r := start(t, server.Config{Limits: server.Limits{StreamIdle: 100 * time.Millisecond}})
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	st, err := pb.NewTelemetryServiceClient(r.conn).Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := st.Recv(); status.Code(err) != codes.Unavailable {
		t.Fatalf("idle stream: %v, want UNAVAILABLE", err)
	}
}
