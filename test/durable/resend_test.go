package durable

import (
	"path/filepath"
	"testing"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/test/testenv"
)

// TestResendAfterRestart: a unit's duplicate window (the 256 latest
// timestamps, as the API promises) survives a restart, in process (the
// state file, orderly stop) and with --nats (the checkpoint and the log,
// after SIGKILL): a client resending its last 60 acknowledged samples,
// or all 256, gets duplicates only, no OUT_OF_ORDER; a sample older than
// the window is out of order.
func TestResendAfterRestart(t *testing.T) {
	if testing.Short() {
		t.Skip("starts genvelope processes")
	}
	for _, tc := range []struct {
		name string
		nats bool
	}{
		{"in process, state file", false},
		{"nats, checkpoint and log", true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			var extra []string
			if tc.nats {
				extra = []string{"--nats", startNATS(t, dir).url(), "--nats-checkpoint-interval", "100ms"}
			}
			fleetPath := fleetFile(t, dir, 1)
			statePath := filepath.Join(dir, "state.json")
			r := startReplica(t, fleetPath, statePath, extra...)
			const steps = 300
			tr := newTraffic(1, steps)
			for _, b := range tr.batches(25, nil) {
				pushUntilAnswered(t, r, b)
			}
			if tc.nats {
				r.proc.Kill()
			} else if err := r.proc.Stop(testenv.WaitLong); err != nil {
				r.proc.Failf(t, "stop: %v", err)
			}
			r.start(t)
			for _, n := range []int{60, 256} {
				var resend []*pb.Sample
				for k := steps - n; k < steps; k++ {
					resend = append(resend, tr.sample(0, k))
				}
				resp, err := tryPush(r, resend)
				if err != nil {
					t.Fatal(err)
				}
				if resp.Duplicates != uint32(n) || resp.Accepted != 0 || len(resp.Rejected) != 0 {
					t.Errorf("resending the last %d acknowledged samples after the restart: %d duplicates, %d accepted, %d rejected (first %v); want %d duplicates",
						n, resp.Duplicates, resp.Accepted, len(resp.Rejected), firstRejected(resp), n)
				}
			}
			resp, err := tryPush(r, []*pb.Sample{tr.sample(0, steps-257)})
			if err != nil {
				t.Fatal(err)
			}
			if len(resp.Rejected) != 1 || resp.Rejected[0].Reason != pb.RejectReason_REJECT_REASON_OUT_OF_ORDER {
				t.Errorf("a sample older than the 256 remembered: %v; want OUT_OF_ORDER", resp)
			}
		})
	}
}

func firstRejected(resp *pb.PushResponse) *pb.Rejection {
	if len(resp.Rejected) == 0 {
		return nil
	}
	return resp.Rejected[0]
}
