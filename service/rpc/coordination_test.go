package rpc_test

import (
	"context"
	"net"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/rpc"
)

// TestGetCoordination: over real gRPC, the example fleet's study has the
// eight checks per unit in the contract's order and finds brindle-gt3's
// deliberate miscoordination (its UEL inside loss-of-field zone 2 at
// 0.95 pu); an unknown unit is NOT_FOUND.
func TestGetCoordination(t *testing.T) {
	store := exampleStore(t)
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	gs := grpc.NewServer()
	pb.RegisterCoordinationServiceServer(gs, rpc.NewCoordination(store))
	go func() { _ = gs.Serve(ln) }()
	t.Cleanup(gs.Stop)
	conn, err := grpc.NewClient(ln.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	cl := pb.NewCoordinationServiceClient(conn)
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()

	resp, err := cl.GetCoordination(ctx, &pb.GetCoordinationRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if len(resp.Units) != 3 || resp.Caution == "" {
		t.Fatalf("%d units, caution %q", len(resp.Units), resp.Caution)
	}
	var fails []string
	for _, u := range resp.Units {
		if len(u.Checks) != 8 || u.Checks[0].Name != "uel_within_capability" || u.Checks[7].Name != "vhz_limiter_before_relay" {
			t.Errorf("%s: checks %v", u.UnitId, u.Checks)
		}
		for _, c := range u.Checks {
			if c.Status == pb.CoordinationStatus_COORDINATION_STATUS_FAIL {
				fails = append(fails, u.UnitId+" "+c.Name)
				if c.Margin == nil || *c.Margin >= 0 || c.WorstVPu == nil || *c.WorstVPu != 0.95 {
					t.Errorf("failing check without a negative margin at 0.95 pu: %v", c)
				}
			}
		}
	}
	if len(fails) != 1 || fails[0] != "brindle-gt3 uel_before_loss_of_field" {
		t.Errorf("failing checks %v, want brindle-gt3 uel_before_loss_of_field", fails)
	}
	one, err := cl.GetCoordination(ctx, &pb.GetCoordinationRequest{UnitId: "larchwater-2"})
	if err != nil || len(one.Units) != 1 || one.Units[0].UnitId != "larchwater-2" {
		t.Errorf("one unit: %v %v", one, err)
	}
	if _, err := cl.GetCoordination(ctx, &pb.GetCoordinationRequest{UnitId: "nope"}); status.Code(err) != codes.NotFound {
		t.Errorf("unknown unit: %v, want NOT_FOUND", err)
	}
}
