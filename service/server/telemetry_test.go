package server_test

import (
	"context"
	"math"
	"strings"
	"testing"
	"time"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
)

// resultOf maps each reject reason of the API to the store's result.
var resultOf = map[pb.RejectReason]ingest.Result{
	pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT:      ingest.RejectUnknownUnit,
	pb.RejectReason_REJECT_REASON_NOT_FINITE:        ingest.RejectNotFinite,
	pb.RejectReason_REJECT_REASON_OUT_OF_RANGE:      ingest.RejectOutOfRange,
	pb.RejectReason_REJECT_REASON_OUT_OF_ORDER:      ingest.RejectOutOfOrder,
	pb.RejectReason_REJECT_REASON_FUTURE:            ingest.RejectFuture,
	pb.RejectReason_REJECT_REASON_INVALID_QUALITY:   ingest.RejectInvalidQuality,
	pb.RejectReason_REJECT_REASON_MISSING_TIME:      ingest.RejectMissingTime,
	pb.RejectReason_REJECT_REASON_OUT_OF_RANGE_TIME: ingest.RejectOutOfRangeTime,
	pb.RejectReason_REJECT_REASON_IMPLAUSIBLE:       ingest.RejectImplausible,
}

// Every reject reason over real gRPC, each in a batch with a good sample
// beside it: the good one is accepted and becomes the unit's latest, the
// bad one is rejected at its index with its reason and a detail, and
// nothing else changes.
func TestPushRejectReasons(t *testing.T) {
	r := start(t, server.Config{})
	ctx := ctxT(t)
	const unit = "harrowmere-1" // 390 MVA, 20 kV, 50 Hz in the example fleet
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	// goodAt is the time of the good sample of case i; the cases run in
	// order, so the unit's latest accepted sample before case i is at
	// goodAt(i-1) = goodAt(i) - 10 s.
	goodAt := func(i int) time.Time { return t0.Add(time.Duration(i+1) * 10 * time.Second) }
	with := func(f func(s *pb.Sample)) func(at time.Time) *pb.Sample {
		return func(at time.Time) *pb.Sample {
			s := sample(unit, at.Add(time.Second), 240, 50, 20.2) // newer than the good one: it would be latest if accepted
			f(s)
			return s
		}
	}
	cases := []struct {
		name     string
		bad      func(goodAt time.Time) *pb.Sample
		badFirst bool // the bad sample is at index 0, the good one at 1
		reason   pb.RejectReason
		detail   string // the detail must mention this
	}{
		{"unknown unit", with(func(s *pb.Sample) { s.UnitId = "nowhere-9" }), true, pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT, "nowhere-9"},
		{"NaN q", with(func(s *pb.Sample) { s.QMvar = math.NaN() }), false, pb.RejectReason_REJECT_REASON_NOT_FINITE, "q_mvar"},
		{"+Inf p", with(func(s *pb.Sample) { s.PMw = math.Inf(1) }), true, pb.RejectReason_REJECT_REASON_NOT_FINITE, "p_mw"},
		{"-Inf v", with(func(s *pb.Sample) { s.VKv = math.Inf(-1) }), false, pb.RejectReason_REJECT_REASON_NOT_FINITE, "v_kv"},
		{"NaN field current", with(func(s *pb.Sample) { s.FieldA = f64(math.NaN()) }), true, pb.RejectReason_REJECT_REASON_NOT_FINITE, "field_a"},
		{"+Inf frequency", with(func(s *pb.Sample) { s.FrequencyHz = f64(math.Inf(1)) }), false, pb.RejectReason_REJECT_REASON_NOT_FINITE, "frequency_hz"},
		{"NaN coolant", with(func(s *pb.Sample) { s.Coolant = f64(math.NaN()) }), true, pb.RejectReason_REJECT_REASON_NOT_FINITE, "coolant"},
		{"zero voltage", with(func(s *pb.Sample) { s.VKv = 0 }), false, pb.RejectReason_REJECT_REASON_OUT_OF_RANGE, "v_kv"},
		{"absurd P", with(func(s *pb.Sample) { s.PMw = 1e9 }), true, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "p_mw"},
		{"absurd Q", with(func(s *pb.Sample) { s.QMvar = -1e5 }), false, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "q_mvar"},
		{"5 Hz", with(func(s *pb.Sample) { s.FrequencyHz = f64(5) }), true, pb.RejectReason_REJECT_REASON_OUT_OF_RANGE, "frequency_hz"},
		{"negative field current", with(func(s *pb.Sample) { s.FieldA = f64(-1) }), false, pb.RejectReason_REJECT_REASON_OUT_OF_RANGE, "field_a"},
		{"invalid timestamp", with(func(s *pb.Sample) { s.Time.Nanos = 2e9 }), true, pb.RejectReason_REJECT_REASON_OUT_OF_RANGE_TIME, "time"},
		// A one-character typo in the year: before 1678 a time overflows
		// Unix nanoseconds; rejected before any arithmetic, time named.
		{"year 1000", with(func(s *pb.Sample) { s.Time = timestamppb.New(time.Date(1000, 3, 1, 12, 0, 0, 0, time.UTC)) }), false,
			pb.RejectReason_REJECT_REASON_OUT_OF_RANGE_TIME, "1000-03-01T12:00:00Z"},
		{"before the horizon", with(func(s *pb.Sample) { s.Time = timestamppb.New(time.Now().Add(-8 * 24 * time.Hour)) }), true,
			pb.RejectReason_REJECT_REASON_OUT_OF_RANGE_TIME, "--backfill"},
		// Plausibility (fleet.DefaultPlausibility), each naming the mix-up.
		{"voltage in pu", with(func(s *pb.Sample) { s.VKv = 1.01 }), false, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "it looks like per unit: send kV"},
		{"voltage in V", with(func(s *pb.Sample) { s.VKv = 20200 }), true, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "it looks like volts: send kV"},
		{"power in kW", with(func(s *pb.Sample) { s.PMw = 240000 }), false, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "it looks like kW: send MW"},
		{"reactive power in kvar", with(func(s *pb.Sample) { s.QMvar = 50000 }), true, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "it looks like kvar: send Mvar"},
		{"field current in mA", with(func(s *pb.Sample) { s.FieldA = f64(2.4e6) }), false, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "it looks like mA: send A"},
		{"armature current", with(func(s *pb.Sample) { s.PMw, s.QMvar, s.VKv = 500, 400, 10.5 }), true, pb.RejectReason_REJECT_REASON_IMPLAUSIBLE, "armature current"},
		{"older than the last batch", func(g time.Time) *pb.Sample {
			return sample(unit, g.Add(-15*time.Second), 240, 50, 20.2) // 5 s before the previous case's good sample
		}, true, pb.RejectReason_REJECT_REASON_OUT_OF_ORDER, "older"},
		{"older than the good one beside it", func(g time.Time) *pb.Sample {
			return sample(unit, g.Add(-5*time.Second), 240, 50, 20.2) // after the previous case, before this one's good sample
		}, false, pb.RejectReason_REJECT_REASON_OUT_OF_ORDER, "older"},
		{"10 min ahead", func(time.Time) *pb.Sample {
			return sample(unit, time.Now().Add(10*time.Minute), 240, 50, 20.2)
		}, true, pb.RejectReason_REJECT_REASON_FUTURE, "ahead"},
		{"QUALITY_INVALID", with(func(s *pb.Sample) { s.Quality = pb.Quality_QUALITY_INVALID }), false, pb.RejectReason_REJECT_REASON_INVALID_QUALITY, "INVALID"},
		{"unknown quality 42", with(func(s *pb.Sample) { s.Quality = pb.Quality(42) }), true, pb.RejectReason_REJECT_REASON_INVALID_QUALITY, "42"},
		{"no time", with(func(s *pb.Sample) { s.Time = nil }), false, pb.RejectReason_REJECT_REASON_MISSING_TIME, "time"},
		{"another unit's NaN", func(g time.Time) *pb.Sample {
			return sample("larchwater-2", g, math.NaN(), 10, 13.8)
		}, true, pb.RejectReason_REJECT_REASON_NOT_FINITE, "p_mw"},
	}
	for i, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			st := r.srv.Store()
			before, unitBefore := st.Counts(), st.Unit(unit).View().Accepted
			g := goodAt(i)
			good := sample(unit, g, 200+float64(i), 40, 20.1)
			bad := tc.bad(g)
			req := &pb.PushRequest{Sequence: uint64(100 + i), Samples: []*pb.Sample{good, bad}}
			badIdx := uint32(1)
			if tc.badFirst {
				req.Samples, badIdx = []*pb.Sample{bad, good}, 0
			}
			resp, err := r.tel.Push(ctx, req)
			if err != nil {
				t.Fatalf("Push: %v", err)
			}
			if resp.Sequence != req.Sequence || resp.Accepted != 1 || resp.Duplicates != 0 || len(resp.Rejected) != 1 {
				t.Fatalf("response %v: want sequence %d, 1 accepted, 0 duplicates, 1 rejected", resp, req.Sequence)
			}
			rj := resp.Rejected[0]
			if rj.Index != badIdx || rj.Reason != tc.reason {
				t.Errorf("rejection index %d reason %v, want index %d reason %v", rj.Index, rj.Reason, badIdx, tc.reason)
			}
			if rj.Detail == "" || !strings.Contains(rj.Detail, tc.detail) {
				t.Errorf("detail %q: want a detail that mentions %q", rj.Detail, tc.detail)
			}

			got, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: unit})
			if err != nil {
				t.Fatalf("GetUnit: %v", err)
			}
			if got.Latest == nil || !got.Latest.Time.AsTime().Equal(g) || got.Latest.PMw != good.PMw {
				t.Errorf("latest %v: want the good sample at %s with p_mw %g", got.Latest, g.Format(time.RFC3339), good.PMw)
			}
			if got.Evaluation == nil {
				t.Error("GetUnit has a latest sample but no evaluation")
			}

			after, unitAfter := st.Counts(), st.Unit(unit).View().Accepted
			want := before
			want[ingest.Accepted]++
			want[resultOf[tc.reason]]++
			if after != want {
				t.Errorf("store counts %v, want %v (before %v)", after, want, before)
			}
			if unitAfter != unitBefore+1 {
				t.Errorf("%s accepted %d samples, want %d", unit, unitAfter, unitBefore+1)
			}
			for _, other := range []string{"larchwater-2", "brindle-gt3"} {
				if v := st.Unit(other).View(); v.HasSample || v.Accepted != 0 {
					t.Errorf("%s changed: %d accepted, has sample %v", other, v.Accepted, v.HasSample)
				}
			}
		})
	}
}

// A batch over the limit is refused whole with INVALID_ARGUMENT and a
// google.rpc.BadRequest detail, on the unary and the streaming call; a
// batch at the limit is taken.
func TestBatchLimit(t *testing.T) {
	for _, tc := range []struct {
		name     string
		maxBatch int // server.Config.MaxBatch; 0 takes the default
		n        int
		refused  bool
	}{
		{"small limit, one over", 10, 11, true},
		{"small limit, at it", 10, 10, false},
		{"default limit, one over", 0, 10001, true},
		{"default limit, at it", 0, 10000, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := start(t, server.Config{MaxBatch: tc.maxBatch})
			ctx := ctxT(t)
			t0 := time.Now().Add(-time.Hour)
			batch := func(from int) *pb.PushRequest {
				req := &pb.PushRequest{Sequence: 7}
				for i := range tc.n {
					req.Samples = append(req.Samples, sample("brindle-gt3", t0.Add(time.Duration(from+i)*time.Millisecond), 100, 20, 15))
				}
				return req
			}
			check := func(call string, resp *pb.PushResponse, err error) {
				t.Helper()
				if !tc.refused {
					if err != nil || resp.Accepted != uint32(tc.n) {
						t.Fatalf("%s: %v, %v: want all %d accepted", call, resp, err, tc.n)
					}
					return
				}
				st, _ := status.FromError(err)
				if st.Code() != codes.InvalidArgument {
					t.Fatalf("%s: %v, want INVALID_ARGUMENT", call, err)
				}
				var br *errdetails.BadRequest
				for _, d := range st.Details() {
					if x, ok := d.(*errdetails.BadRequest); ok {
						br = x
					}
				}
				if br == nil || len(br.FieldViolations) != 1 || br.FieldViolations[0].Field != "samples" || br.FieldViolations[0].Description == "" {
					t.Fatalf("%s: details %v, want one BadRequest field violation on samples", call, st.Details())
				}
			}

			before := r.srv.Store().Counts()
			resp, err := r.tel.Push(ctx, batch(0))
			check("Push", resp, err)

			st, err := r.tel.Stream(ctx)
			if err != nil {
				t.Fatal(err)
			}
			if err := st.Send(batch(tc.n)); err != nil {
				t.Fatal(err)
			}
			resp, err = st.Recv()
			check("Stream", resp, err)
			_ = st.CloseSend()

			after := r.srv.Store().Counts()
			if tc.refused && after != before {
				t.Errorf("a refused batch changed the counts: %v, before %v", after, before)
			}
			if !tc.refused && after[ingest.Accepted]-before[ingest.Accepted] != uint64(2*tc.n) {
				t.Errorf("accepted %d, want %d", after[ingest.Accepted]-before[ingest.Accepted], 2*tc.n)
			}
		})
	}
}

// The server sends exactly one response per request, with the request's
// sequence number, in the order of the requests.
func TestStreamOrder(t *testing.T) {
	r := start(t, server.Config{})
	ctx := ctxT(t)
	st, err := r.tel.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	const batches = 200
	t0 := time.Now().Add(-time.Hour)
	// Batch i carries i%4 samples of an unknown unit beside 3 good ones,
	// so each response's counts also identify its request.
	seq := func(i int) uint64 { return uint64(1_000_003*i) ^ 0x5a5a }
	sent := make(chan error, 1)
	go func() {
		for i := range batches {
			req := &pb.PushRequest{Sequence: seq(i)}
			for k, u := range []string{"harrowmere-1", "larchwater-2", "brindle-gt3"} {
				req.Samples = append(req.Samples, sample(u, t0.Add(time.Duration(i)*time.Second), 50+float64(k), 10, []float64{20, 13.8, 15}[k]))
			}
			for range i % 4 {
				req.Samples = append(req.Samples, sample("ghost", t0, 1, 1, 1))
			}
			if err := st.Send(req); err != nil {
				sent <- err
				return
			}
		}
		sent <- st.CloseSend()
	}()
	resps, err := recvAll(st)
	if err != nil {
		t.Fatalf("stream ended with %v after %d responses", err, len(resps))
	}
	if err := <-sent; err != nil {
		t.Fatalf("send: %v", err)
	}
	if len(resps) != batches {
		t.Fatalf("%d responses to %d requests", len(resps), batches)
	}
	for i, resp := range resps {
		if resp.Sequence != seq(i) || resp.Accepted != 3 || resp.Duplicates != 0 || len(resp.Rejected) != i%4 {
			t.Fatalf("response %d: %v, want sequence %d, 3 accepted, %d rejected", i, resp, seq(i), i%4)
		}
		for k, rj := range resp.Rejected {
			if rj.Index != uint32(3+k) || rj.Reason != pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT {
				t.Fatalf("response %d rejection %d: %v", i, k, rj)
			}
		}
	}
}

// A client whose stream is cut resends every batch it has no
// acknowledgement for; in the end each sample is accepted exactly once
// and the resent ones that had already arrived count as duplicates.
func TestResendAfterDroppedStream(t *testing.T) {
	r := start(t, server.Config{})
	units := []string{"harrowmere-1", "larchwater-2", "brindle-gt3"}
	kv := []float64{20, 13.8, 15}
	const (
		batches   = 24
		perUnit   = 10 // samples of each unit per batch: 240 in all, within the 256 timestamps a unit remembers
		acked     = 6  // acknowledgements the client reads before the cut
		processed = 12 // batches the server is known to have taken before the cut
	)
	t0 := time.Now().Add(-time.Hour)
	reqs := make([]*pb.PushRequest, batches)
	for b := range reqs {
		reqs[b] = &pb.PushRequest{Sequence: uint64(b + 1)}
		for k := range perUnit {
			at := t0.Add(time.Duration(b*perUnit+k) * time.Second)
			for j, u := range units {
				reqs[b].Samples = append(reqs[b].Samples, sample(u, at, 60+float64(b), float64(k), kv[j]))
			}
		}
	}
	perBatch := uint64(perUnit * len(units))
	total := uint64(batches) * perBatch

	// The first connection: send every batch, read a few acks, wait until
	// the server has taken more than that, then cut.
	ctx1, cut := context.WithCancel(context.Background())
	defer cut()
	st, err := r.tel.Stream(ctx1)
	if err != nil {
		t.Fatal(err)
	}
	for _, req := range reqs {
		if err := st.Send(req); err != nil {
			t.Fatalf("send %d: %v", req.Sequence, err)
		}
	}
	var ackedSeq []uint64
	for range acked {
		resp, err := st.Recv()
		if err != nil {
			t.Fatalf("recv: %v", err)
		}
		ackedSeq = append(ackedSeq, resp.Sequence)
	}
	deadline := time.Now().Add(waitLong)
	for r.srv.Store().Counts()[ingest.Accepted] < processed*perBatch {
		if time.Now().After(deadline) {
			t.Fatalf("the server took only %d samples within %s", r.srv.Store().Counts()[ingest.Accepted], waitLong)
		}
		time.Sleep(5 * time.Millisecond)
	}
	cut()
	for i, s := range ackedSeq {
		if s != uint64(i+1) {
			t.Fatalf("acknowledgements %v, want 1..%d", ackedSeq, acked)
		}
	}

	// Reconnect and resend everything not acknowledged.
	ctx := ctxT(t)
	st2, err := r.tel.Stream(ctx)
	if err != nil {
		t.Fatal(err)
	}
	go func() {
		for _, req := range reqs[acked:] {
			if st2.Send(req) != nil {
				return
			}
		}
		_ = st2.CloseSend()
	}()
	resps, err := recvAll(st2)
	if err != nil || len(resps) != batches-acked {
		t.Fatalf("resend: %d responses, %v; want %d", len(resps), err, batches-acked)
	}
	var accepted, dups uint64
	for i, resp := range resps {
		if resp.Sequence != uint64(acked+i+1) || len(resp.Rejected) != 0 || uint64(resp.Accepted+resp.Duplicates) != perBatch {
			t.Fatalf("resend response %d: %v", i, resp)
		}
		accepted += uint64(resp.Accepted)
		dups += uint64(resp.Duplicates)
	}
	if dups < (processed-acked)*perBatch {
		t.Errorf("%d duplicates on resend, want at least the %d samples of batches %d..%d the server had taken",
			dups, (processed-acked)*perBatch, acked+1, processed)
	}

	// The cut stream's last batch may still be in its handler: its
	// samples accepted (so the resend found them duplicates) and its
	// tally not yet committed. Wait for the counts to settle.
	for deadline := time.Now().Add(waitLong); r.srv.Store().Counts()[ingest.Accepted] < total && time.Now().Before(deadline); {
		time.Sleep(5 * time.Millisecond)
	}
	c := r.srv.Store().Counts()
	if c[ingest.Accepted] != total {
		t.Errorf("store accepted %d samples, want each of the %d exactly once", c[ingest.Accepted], total)
	}
	// A batch of the cut stream that the server had already read may still
	// be applied after the resend; it then counts as duplicates, never as
	// a second acceptance.
	if c[ingest.Duplicate] < dups {
		t.Errorf("store counted %d duplicates, the resend's responses %d", c[ingest.Duplicate], dups)
	}
	for res := ingest.RejectUnknownUnit; res < ingest.NumResults; res++ {
		if c[res] != 0 {
			t.Errorf("%d samples rejected as %v", c[res], res)
		}
	}
	fams := r.scrape(t)
	for _, tc := range []struct {
		name   string
		labels map[string]string
		want   float64
	}{
		{"genvelope_samples_total", map[string]string{"result": "accepted"}, float64(total)},
		{"genvelope_unit_samples_accepted_total", map[string]string{"unit": units[0]}, float64(batches * perUnit)},
		{"genvelope_unit_samples_accepted_total", map[string]string{"unit": units[1]}, float64(batches * perUnit)},
		{"genvelope_unit_samples_accepted_total", map[string]string{"unit": units[2]}, float64(batches * perUnit)},
	} {
		if v, ok := metricValue(fams, tc.name, tc.labels); !ok || v != tc.want {
			t.Errorf("%s%v = %v (found %v), want %v", tc.name, tc.labels, v, ok, tc.want)
		}
	}
	for _, u := range units {
		v := r.srv.Store().Unit(u).View()
		last := t0.Add(time.Duration(batches*perUnit-1) * time.Second)
		if v.Accepted != batches*perUnit || !v.Latest.Time.Equal(last) {
			t.Errorf("%s: %d accepted, latest %v; want %d, latest %v", u, v.Accepted, v.Latest.Time, batches*perUnit, last)
		}
	}
}
