package durable_test

import (
	"context"
	"io"
	"log/slog"
	"net/http"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/durable"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testenv"
)

// TestInProcess runs the service with its log in this process against a
// real nats-server, so that -race sees the publisher, the consumer, the
// checkpoints and the operator actions working at once: two clients
// push concurrently, an operator acknowledges and the fleet is
// reloaded meanwhile; at the end every sample sent is applied once.
func TestInProcess(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server")
	}
	dir := t.TempDir()
	url := testenv.StartNATS(t, dir)

	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	checkpoint := filepath.Join(dir, "checkpoint.json")
	var dl *durable.Log
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		var err error
		dl, err = durable.Open(context.Background(), durable.Config{URLs: []string{url},
			CheckpointPath: checkpoint, CheckpointInterval: 20 * time.Millisecond, Logger: log})
		if err == nil {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal(err)
		}
		time.Sleep(50 * time.Millisecond)
	}
	defer dl.Close()
	srv, err := server.New(server.Config{FleetPath: "../../deploy/examples/fleet.yaml", GRPCListen: "127.0.0.1:0",
		HTTPListen: "127.0.0.1:0", Logger: log, Log: dl})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- srv.Run(ctx) }()
	conn, err := grpc.NewClient(srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	tel, alarms := pb.NewTelemetryServiceClient(conn), pb.NewAlarmServiceClient(conn)

	units := []string{"harrowmere-1", "larchwater-2", "brindle-gt3"}
	base := time.Now().Add(-10 * time.Minute).Truncate(time.Second)
	const steps = 120
	var wg sync.WaitGroup
	for c, id := range units {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var reqs []*pb.PushRequest // the third unit's batches go over one Stream, pipelined
			defer func() {
				if len(reqs) > 0 {
					streamAll(ctx, t, tel, reqs)
				}
			}()
			for k := 0; k < steps; k += 4 {
				var req pb.PushRequest
				for j := k; j < k+4; j++ {
					// Unit 0 runs far overexcited: its field alarm rises.
					q := 50.0
					if c == 0 {
						q = 400
					}
					// P and V plausible for each unit (390 MVA 20 kV, 13.8 kV, 15 kV).
					pv := map[string][2]float64{"harrowmere-1": {200, 20.4}, "larchwater-2": {80, 13.8}, "brindle-gt3": {100, 15}}[id]
					req.Samples = append(req.Samples, &pb.Sample{UnitId: id, Time: timestamppb.New(base.Add(time.Duration(j) * time.Second)),
						PMw: pv[0], QMvar: q, VKv: pv[1]})
				}
				if c == 2 {
					reqs = append(reqs, &req)
					continue
				}
				for {
					cctx, ccancel := context.WithTimeout(ctx, testenv.WaitLong)
					resp, err := tel.Push(cctx, &req)
					ccancel()
					if err == nil {
						if resp.Accepted+resp.Duplicates != 4 {
							t.Errorf("%s: %v", id, resp)
						}
						break
					}
					t.Logf("push %s: %v (resending)", id, err)
				}
			}
		}()
	}
	wg.Add(1)
	go func() {
		defer wg.Done()
		resp, err := http.Post("http://"+srv.HTTPAddr()+"/-/reload", "", nil)
		if err != nil {
			t.Errorf("reload: %v", err)
			return
		}
		resp.Body.Close()
		if resp.StatusCode != http.StatusOK {
			t.Errorf("reload through the log: %s", resp.Status)
		}
	}()
	wg.Wait()
	actx, acancel := context.WithTimeout(ctx, testenv.WaitLong)
	defer acancel()
	if _, err := alarms.AcknowledgeAlarm(actx, &pb.AcknowledgeAlarmRequest{UnitId: units[0], Limit: "field", Operator: "desk"}); err != nil {
		t.Errorf("acknowledge through the log: %v", err)
	}
	if ok, why := dl.Ready(); !ok {
		t.Errorf("not ready after the traffic: %s", why)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	cp, err := durable.ReadCheckpoint(checkpoint)
	if err != nil {
		t.Fatal(err)
	}
	for _, id := range units {
		if lg := cp.Ledger[id]; lg == nil || lg.Count != steps {
			t.Errorf("%s: applied %+v, want %d samples", id, lg, steps)
		}
	}
	if a := cp.State.Units[units[0]].Alarms["field"]; !a.Acknowledged {
		t.Errorf("the acknowledgement is not in the checkpoint: %+v", a)
	}
}

// streamAll sends every batch over one Stream without waiting, then
// reads the answers, which must come in order and account for every
// sample.
func streamAll(ctx context.Context, t *testing.T, tel pb.TelemetryServiceClient, reqs []*pb.PushRequest) {
	sctx, cancel := context.WithTimeout(ctx, testenv.WaitLong)
	defer cancel()
	st, err := tel.Stream(sctx)
	if err != nil {
		t.Errorf("Stream: %v", err)
		return
	}
	go func() {
		for i, r := range reqs {
			r.Sequence = uint64(i + 1)
			if st.Send(r) != nil {
				return
			}
		}
		_ = st.CloseSend()
	}()
	for i := range reqs {
		resp, err := st.Recv()
		if err != nil {
			t.Errorf("Stream answer %d: %v", i+1, err)
			return
		}
		if resp.Sequence != uint64(i+1) || resp.Accepted != 4 {
			t.Errorf("Stream answer %d: %v", i+1, resp)
		}
	}
}
