package server_test

import (
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"maps"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/durable"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testenv"
)

// opsInLog returns the operator actions in the log's <prefix>.ops
// subject (the "op" of each message), the sweeps left out.
func opsInLog(t *testing.T, url string) []string {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	st, err := js.Stream(ctx, "GENVELOPE")
	if err != nil {
		t.Fatal(err)
	}
	info, err := st.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	cons, err := st.OrderedConsumer(ctx, jetstream.OrderedConsumerConfig{FilterSubjects: []string{"genvelope.ops"}})
	if err != nil {
		t.Fatal(err)
	}
	var out []string
	// Up to the stream's end now: sweeps go on arriving meanwhile.
	for last := uint64(0); last < info.State.LastSeq; {
		batch, err := cons.Fetch(100, jetstream.FetchMaxWait(time.Second))
		if err != nil {
			t.Fatal(err)
		}
		n := 0
		for msg := range batch.Messages() {
			n++
			if meta, err := msg.Metadata(); err == nil {
				last = meta.Sequence.Stream
			}
			var o struct {
				Op, By string
			}
			if err := json.Unmarshal(msg.Data(), &o); err != nil {
				t.Fatalf("ops message %q: %v", msg.Data(), err)
			}
			if o.Op != "sweep" {
				out = append(out, o.Op+" by "+o.By)
			}
		}
		if n == 0 {
			break
		}
	}
	return out
}

// TestThermalActionsThroughTheLog: with --nats and an access file,
// ResetThermal and DiscardSample go through the log and are journalled
// from it with the caller's identity; calls the access file refuses are
// audited as denied and never written to the log.
func TestThermalActionsThroughTheLog(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server")
	}
	p := newPKI(t)
	url := testenv.StartNATS(t, p.dir)
	var dl *durable.Log
	deadline := time.Now().Add(waitLong)
	for {
		var err error
		dl, err = durable.Open(context.Background(), durable.Config{URLs: []string{url}, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))})
		if err == nil {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal(err)
		}
		time.Sleep(50 * time.Millisecond)
	}
	t.Cleanup(dl.Close)
	r, audit := secureServer(t, p, func(c *server.Config) {
		c.Log = dl
		c.JournalPath = filepath.Join(p.dir, "journal.jsonl")
	})
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
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()

	tel := pb.NewTelemetryServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["gw-harrowmere"]))
	t0 := time.Now().Add(-time.Minute).Truncate(time.Second)
	var samples []*pb.Sample
	for i := range 5 {
		samples = append(samples, sampleAt("harrowmere-1", t0.Add(time.Duration(i)*time.Second), 300, 100, 20.4))
	}
	if resp, err := tel.Push(ctx, &pb.PushRequest{Samples: samples}); err != nil || resp.Accepted != 5 {
		t.Fatalf("Push: %v, %v", resp, err)
	}

	journalAs := func(who string) pb.JournalServiceClient {
		return pb.NewJournalServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients[who]))
	}
	viewer, op := journalAs("viewer-all"), journalAs("op-harrowmere")
	last := samples[len(samples)-1].Time
	for _, tc := range []struct {
		name string
		call func() error
		want codes.Code
	}{
		{"viewer resets", func() error {
			_, err := viewer.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "harrowmere-1", Operator: "someone"})
			return err
		}, codes.PermissionDenied},
		{"viewer discards", func() error {
			_, err := viewer.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: "harrowmere-1", Time: last, Operator: "someone"})
			return err
		}, codes.PermissionDenied},
		{"operator of another site resets: answered as a unit not in the fleet", func() error {
			_, err := op.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "larchwater-2", Operator: "someone"})
			return err
		}, codes.NotFound},
		{"operator discards", func() error {
			_, err := op.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: "harrowmere-1", Time: last, Reason: "spike"})
			return err
		}, codes.OK},
		{"operator resets", func() error {
			_, err := op.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "harrowmere-1", Winding: "field", Reason: "sensor replaced"})
			return err
		}, codes.OK},
	} {
		if got := status.Code(tc.call()); got != tc.want {
			t.Errorf("%s: %v, want %v", tc.name, got, tc.want)
		}
	}

	if got := opsInLog(t, url); strings.Join(got, "; ") != "discard by op-harrowmere; reset by op-harrowmere" {
		t.Errorf("operator actions in the log: %q; want the operator's discard and reset only", got)
	}
	entries, _, err := r.srv.Journal().Matching(journal.Filter{Changes: []string{journal.ChangeReset, journal.ChangeDiscard}}, 10)
	if err != nil {
		t.Fatal(err)
	}
	if len(entries) != 2 {
		t.Fatalf("journal entries of resets and discards: %+v; want 2", entries)
	}
	for _, e := range entries {
		if e.Operator != "op-harrowmere" || e.LogSeq == 0 || e.Unit != "harrowmere-1" {
			t.Errorf("journal entry %s by %q, log sequence %d, unit %s; want op-harrowmere, from the log, harrowmere-1", e.Change, e.Operator, e.LogSeq, e.Unit)
		}
	}
	denied := map[string]int{}
	for _, e := range audit.Find("grpc", access.OutcomeDenied) {
		denied[e.Identity+" "+e.Action]++
	}
	if want := map[string]int{"viewer-all " + "grpc " + pb.JournalService_ResetThermal_FullMethodName: 1,
		"viewer-all " + "grpc " + pb.JournalService_DiscardSample_FullMethodName:   1,
		"op-harrowmere " + "grpc " + pb.JournalService_ResetThermal_FullMethodName: 1}; !maps.Equal(denied, want) {
		t.Errorf("denied in the audit: %v; want %v", denied, want)
	}
	for _, action := range []string{"grpc reset thermal", "grpc discard sample"} {
		done := audit.Find(action, access.OutcomeDone)
		if len(done) != 1 {
			t.Errorf("%s: %d done in the audit; want 1", action, len(done))
		}
		for _, e := range done {
			if e.Identity != "op-harrowmere" {
				t.Errorf("%s done by %q in the audit", action, e.Identity)
			}
		}
	}
}
