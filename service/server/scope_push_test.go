package server_test

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"
	"strings"
	"testing"
	"time"

	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/durable"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testenv"
	"github.com/genvelope/genvelope/test/testpki"
)

// openLog opens a durable log on a nats-server of its own (skipped
// without one, failed under CI=true).
func openLog(t *testing.T, dir string) (*durable.Log, string) {
	t.Helper()
	url := testenv.StartNATS(t, dir)
	deadline := time.Now().Add(waitLong)
	for {
		dl, err := durable.Open(context.Background(), durable.Config{URLs: []string{url}, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
		if err == nil {
			t.Cleanup(dl.Close)
			return dl, url
		}
		if time.Now().After(deadline) {
			t.Fatal(err)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// probeBatch is a batch a writer could probe a unit id with: a good
// sample and samples wrong in each way a sample can be, so that no check
// made after the unit's could tell the answers apart.
func probeBatch(id string, at time.Time) []*pb.Sample {
	nan := math.NaN()
	return []*pb.Sample{
		sampleAt(id, at, 300, 100, 20.4),
		sampleAt(id, at.Add(time.Millisecond), nan, 100, 20.4),
		{UnitId: id, PMw: 300, QMvar: 100, VKv: 20.4}, // no time
		{UnitId: id, Time: timestamppb.New(at), PMw: 300, QMvar: 100, VKv: 20.4, Quality: 99},
		sampleAt(id, at.Add(time.Hour), 300, 100, 20.4), // in the future
		sampleAt(id, at, 300, 100, -5),                  // out of range
		{UnitId: id, Time: &timestamppb.Timestamp{Seconds: math.MaxInt64}, PMw: 1, QMvar: 1, VKv: 1},
	}
}

// pushAnswer is what a writer sees of the answer to a batch about one
// unit id: every per-sample field, with the id replaced.
func pushAnswer(resp *pb.PushResponse, id string) string {
	var b strings.Builder
	fmt.Fprintf(&b, "accepted %d duplicates %d", resp.Accepted, resp.Duplicates)
	for _, rj := range resp.Rejected {
		fmt.Fprintf(&b, "; #%d %v %q", rj.Index, rj.Reason, strings.ReplaceAll(rj.Detail, id, "UNIT"))
	}
	return b.String()
}

// A telemetry writer pushing for a unit outside its scope gets, per
// sample, exactly the answer for a unit that is not in the fleet (reason,
// detail, nothing accepted), whatever else the sample has wrong, on Push
// and on Stream, in memory and through the durable log's pre-write
// check: it cannot probe which unit ids exist. The refusals are still
// counted and audited as denials (operator side). A writer that may view
// the unit (it knows the unit exists) is answered permission_denied.
func TestOutOfScopeSampleLikeMissing(t *testing.T) {
	for _, durableLog := range []bool{false, true} {
		name := "memory"
		if durableLog {
			name = "durable"
		}
		t.Run(name, func(t *testing.T) {
			if durableLog && testing.Short() {
				t.Skip("starts nats-server")
			}
			p := newPKI(t)
			for _, cn := range []string{"gw-larch", "gw-all", "gw-seeing"} {
				p.clients[cn] = p.ca.Client(t, cn)
			}
			accessFile := testAccess +
				"  - name: gw-larch\n    grants: [{role: telemetry_writer, units: [\"larchwater-*\"]}]\n" +
				"  - name: gw-all\n    grants: [{role: telemetry_writer}]\n" +
				"  - name: gw-seeing\n    grants: [{role: telemetry_writer, sites: [harrowmere]}, {role: viewer}]\n"
			var dl *durable.Log
			if durableLog {
				dl, _ = openLog(t, p.dir)
			}
			r, audit := secureServer(t, p, func(c *server.Config) {
				c.Security.AccessFile = testpki.Write(t, p.dir, "access-writers.yaml", []byte(accessFile))
				if dl != nil {
					c.Log = dl
				}
			})
			if durableLog {
				for deadline := time.Now().Add(waitLong); ; {
					code, body := httpsDo(t, p, r, "GET", "/readyz", "admin", "")
					if code == 200 {
						break
					}
					if time.Now().After(deadline) {
						t.Fatalf("not ready: %d %s", code, body)
					}
					time.Sleep(50 * time.Millisecond)
				}
			}
			ctx, cancel := context.WithTimeout(context.Background(), waitLong)
			defer cancel()
			at := time.Now().Add(-time.Minute)
			client := func(who string) pb.TelemetryServiceClient {
				return pb.NewTelemetryServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients[who]))
			}
			push := func(who, id string) string {
				resp, err := client(who).Push(ctx, &pb.PushRequest{Sequence: 3, Samples: probeBatch(id, at)})
				if err != nil {
					t.Fatalf("%s pushing %s: %v", who, id, err)
				}
				return pushAnswer(resp, id)
			}
			stream := func(who, id string) string {
				st, err := client(who).Stream(ctx)
				if err != nil {
					t.Fatal(err)
				}
				if err := st.Send(&pb.PushRequest{Sequence: 3, Samples: probeBatch(id, at)}); err != nil {
					t.Fatal(err)
				}
				resp, err := st.Recv()
				if err != nil {
					t.Fatalf("%s streaming %s: %v", who, id, err)
				}
				_ = st.CloseSend()
				return pushAnswer(resp, id)
			}
			// What any writer gets for a unit that is not in the fleet,
			// from one that may push for every unit.
			want := push("gw-all", "nowhere-9")
			if n := strings.Count(want, pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT.String()); n != len(probeBatch("x", at)) {
				t.Fatalf("a unit not in the fleet is answered %s; want every sample unknown_unit", want)
			}
			denied := 0
			for _, tc := range []struct{ who, id, why string }{
				{"gw-larch", "harrowmere-1", "a unit outside the writer's pattern"},
				{"gw-larch", "larchwater-9", "a unit inside the pattern, not in the fleet"},
				{"gw-larch", "nowhere-9", "a unit outside the pattern, not in the fleet"},
				{"gw-harrowmere", "larchwater-2", "another site's unit"},
				{"gw-harrowmere", "harrowmere-9", "a unit not in the fleet"},
				{"gw-seeing", "nowhere-9", "a unit not in the fleet, to a writer that views every unit"},
			} {
				for _, via := range []struct {
					name string
					send func(who, id string) string
				}{{"Push", push}, {"Stream", stream}} {
					if got := via.send(tc.who, tc.id); got != want {
						t.Errorf("%s %s %s (%s):\n%s\nwant, as for a unit not in the fleet:\n%s", tc.who, via.name, tc.id, tc.why, got, want)
					}
				}
				if tc.id != "larchwater-9" {
					denied += 2 * len(probeBatch("x", at))
				}
			}
			// A writer that may view the unit knows it exists: it is told
			// it may not push for it.
			seen := push("gw-seeing", "larchwater-2")
			if n := strings.Count(seen, pb.RejectReason_REJECT_REASON_PERMISSION_DENIED.String()); n != len(probeBatch("x", at)) {
				t.Errorf("a writer that views larchwater-2 pushing for it: %s; want every sample permission_denied", seen)
			}
			denied += len(probeBatch("x", at))

			// The caller-side counter says unknown_unit; the operator-side
			// ones and the audit say permission_denied.
			fams := scrapeAs(t, p, r)
			if v, _ := metricValue(fams, "genvelope_samples_total", map[string]string{"result": "permission_denied"}); v != float64(len(probeBatch("x", at))) {
				t.Errorf("genvelope_samples_total{result=permission_denied} = %v, want %d (the viewing writer's only)", v, len(probeBatch("x", at)))
			}
			if v, _ := metricValue(fams, "genvelope_access_denied_total", map[string]string{"reason": access.ReasonSampleDenied}); v != float64(denied) {
				t.Errorf("genvelope_access_denied_total{reason=permission_denied} = %v, want %d", v, denied)
			}
			n := 0
			for _, e := range audit.Find("grpc push", access.OutcomeDenied) {
				if e.Identity == "gw-larch" && e.Target == "harrowmere-1" && e.Reason == access.ReasonSampleDenied {
					n++
				}
			}
			if n != 2 {
				t.Errorf("%d audited denials of gw-larch's pushes for harrowmere-1, want 2 (Push and Stream)", n)
			}
		})
	}
}
