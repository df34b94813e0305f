// Package rpc implements genvelope's gRPC services over the live state
// of package ingest: TelemetryService takes measurements, FleetService
// answers what the fleet looks like now.
package rpc

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"time"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/ingest"
)

// DefaultMaxBatch is the largest number of samples one request may carry.
const DefaultMaxBatch = 10000

// Telemetry implements TelemetryService.
type Telemetry struct {
	pb.UnimplementedTelemetryServiceServer

	store    *ingest.Store
	log      Log
	maxBatch int
	now      func() time.Time
	draining <-chan struct{}
	denied   func(ctx context.Context, n int, unitID string)
}

// TelemetryOptions configure a Telemetry server.
type TelemetryOptions struct {
	MaxBatch int              // default DefaultMaxBatch
	Now      func() time.Time // server clock; default time.Now
	// Draining, when closed, ends open streams once the batch in hand is
	// answered, with UNAVAILABLE, so that a graceful stop does not wait
	// on clients that never close.
	Draining <-chan struct{}
	// Log, when set, makes every acknowledgement durable: the samples
	// that pass the checks are written to the log, and the batch is
	// answered once they are in it and applied from it.
	Log Log
	// Denied, when set, hears of the samples of one request refused
	// because the caller (access.FromContext) may not push for their
	// units: how many, and the first such unit.
	Denied func(ctx context.Context, n int, unitID string)
}

// Log is the durable path of accepted samples (package durable).
type Log interface {
	// Check says what would become of smp, without recording it; units,
	// when not nil, is the resolver of the stream smp came on.
	Check(units *ingest.Resolver, now time.Time, smp *ingest.Sample) (ingest.Result, string)
	// Append starts writing smps to the log (it may reorder smps, and
	// holds them until wait returns); wait returns what applying each of
	// them from the log gave, by its place in smps as given. Batches
	// appended one after another enter the log in that order. An error
	// (of either) means the samples may or may not be in the log:
	// nothing is acknowledged, and the client resends. wait must be
	// called, with a done ctx to give up.
	Append(ctx context.Context, now time.Time, smps []ingest.Sample) (wait func(context.Context) ([]ingest.Result, []string, error), err error)
}

// streamWindow is how many batches of one stream may be in the log at
// once, waiting to be answered in order.
const streamWindow = 8

// NewTelemetry returns a TelemetryService over store.
func NewTelemetry(store *ingest.Store, o TelemetryOptions) *Telemetry {
	if o.MaxBatch <= 0 {
		o.MaxBatch = DefaultMaxBatch
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	return &Telemetry{store: store, log: o.Log, maxBatch: o.MaxBatch, now: o.Now, draining: o.Draining, denied: o.Denied}
}

// Push takes one batch.
func (t *Telemetry) Push(ctx context.Context, req *pb.PushRequest) (*pb.PushResponse, error) {
	return t.push(ctx, req, nil)
}

// Stream takes batches and answers each, in order.
func (t *Telemetry) Stream(st grpc.BidiStreamingServer[pb.PushRequest, pb.PushResponse]) error {
	ctx := st.Context()
	reqs := make(chan *pb.PushRequest)
	errc := make(chan error, 1)
	// Requests answered in process come back here to be decoded into
	// again: with the service's Codec a batch reuses the samples of an
	// earlier one instead of allocating its own.
	free := make(chan *pb.PushRequest, 2)
	// Receive on a goroutine of its own so that a drain can end the
	// stream while the client is idle; it ends when the stream does.
	go func() {
		// The stream's unit ids, so that a sample's id is not a new
		// string every time (the fleet's size bounds them).
		batch := StreamBatch{IDs: NewStreamIDs(max(len(t.store.Units()), 1))}
		for {
			var req *pb.PushRequest
			select {
			case req = <-free:
			default:
				req = new(pb.PushRequest)
			}
			batch.PushRequest = req
			if err := st.RecvMsg(&batch); err != nil {
				errc <- err
				return
			}
			select {
			case reqs <- req:
			case <-ctx.Done():
				return
			}
		}
	}()
	if t.log != nil {
		return t.streamLog(st, reqs, errc, free)
	}
	var units ingest.Resolver // this stream's units, each resolved once
	answer := func(req *pb.PushRequest) error {
		resp, err := t.push(ctx, req, &units)
		if err != nil {
			return err
		}
		select {
		case free <- req: // push kept nothing of it
		default:
		}
		return st.Send(resp)
	}
	for {
		select {
		case req := <-reqs:
			if err := ctx.Err(); err != nil {
				return err // the client has gone: it will resend what it lacks an answer for
			}
			if err := answer(req); err != nil {
				return err
			}
		case err := <-errc:
			if errors.Is(err, io.EOF) {
				return nil
			}
			return err
		case <-t.draining:
			select {
			case req := <-reqs:
				if err := answer(req); err != nil {
					return err
				}
			default:
			}
			return status.Error(codes.Unavailable, "genvelope is shutting down: reconnect and resend any batch not acknowledged")
		}
	}
}

// push takes one batch; units, when not nil, is the resolver of the
// stream it came on.
func (t *Telemetry) push(ctx context.Context, req *pb.PushRequest, units *ingest.Resolver) (*pb.PushResponse, error) {
	if err := t.checkSize(req); err != nil {
		return nil, err
	}
	now := t.now()
	if t.log != nil {
		return t.pushLog(ctx, req, now, units)
	}
	resp := &pb.PushResponse{Sequence: req.Sequence}
	var tally ingest.Tally
	var d denials
	caller := access.FromContext(ctx) // nil: no access control
	for i, s := range req.Samples {
		var smp ingest.Sample // stays on the stack: Accept is called directly
		res, detail, denied := t.convert(caller, s, &smp)
		if res == ingest.Accepted {
			res, detail = t.store.AcceptFrom(units, now, &smp)
		}
		tally[res]++
		d.note(denied, s.UnitId)
		answer(resp, i, res, detail)
	}
	t.store.Commit(&tally)
	t.report(ctx, &d)
	return resp, nil
}

// denials counts the samples of one batch refused for want of rights,
// whether answered permission_denied or as an unknown unit.
type denials struct {
	n    int
	unit string // the first
}

func (d *denials) note(denied bool, unitID string) {
	if denied {
		if d.n++; d.n == 1 {
			d.unit = unitID
		}
	}
}

// report hands a batch's denials to the Denied hook.
func (t *Telemetry) report(ctx context.Context, d *denials) {
	if d.n > 0 && t.denied != nil {
		t.denied(ctx, d.n, d.unit)
	}
}

// checkSize refuses a batch larger than the limit.
func (t *Telemetry) checkSize(req *pb.PushRequest) error {
	if n := len(req.Samples); n > t.maxBatch {
		st := status.New(codes.InvalidArgument, fmt.Sprintf("batch %d has %d samples, more than the limit of %d: split it", req.Sequence, n, t.maxBatch))
		if d, err := st.WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{{
			Field:       "samples",
			Description: fmt.Sprintf("at most %d samples per request, got %d", t.maxBatch, n),
		}}}); err == nil {
			st = d
		}
		return st.Err()
	}
	return nil
}

// convert converts s into smp, or returns the reason it cannot be.
// denied reports a sample the caller (nil: no access control) may not
// push for; such a sample is refused first, so that a writer learns
// nothing of units it may not push for from what else the sample has
// wrong. A unit the caller may not view is answered exactly as a unit
// that is not in the fleet (reason, detail and the samples_total label),
// so that a writer cannot probe which unit ids exist; only a unit it may
// view (it knows the unit exists) is answered permission_denied. The
// refusal is still counted and audited as a denial (the Denied hook).
// It takes no checking function: called through a function value or an
// interface, the sample would move to the heap, one allocation a sample.
func (t *Telemetry) convert(caller *access.Caller, s *pb.Sample, smp *ingest.Sample) (res ingest.Result, detail string, denied bool) {
	if caller != nil && !caller.Allows(s.UnitId) {
		if caller.May(access.Viewer, s.UnitId) && t.store.Unit(s.UnitId) != nil {
			return ingest.RejectPermissionDenied, "this identity may not push samples for the unit", true
		}
		return ingest.RejectUnknownUnit, ingest.UnknownUnitDetail(s.UnitId), true
	}
	res, detail = FromProto(s, smp)
	if res != ingest.Accepted && t.store.Unit(s.UnitId) == nil {
		// The unit is the first thing a sample is judged by.
		return ingest.RejectUnknownUnit, ingest.UnknownUnitDetail(s.UnitId), false
	}
	return res, detail, false
}

// answer adds the result of sample i to resp.
func answer(resp *pb.PushResponse, i int, res ingest.Result, detail string) {
	switch res {
	case ingest.Accepted:
		resp.Accepted++
	case ingest.Duplicate:
		resp.Duplicates++
	default:
		resp.Rejected = append(resp.Rejected, &pb.Rejection{Index: uint32(i), Reason: reasonProto(res), Detail: detail})
	}
}

// pushLog takes a batch on the durable path: the samples that pass the
// checks are written to the log, and the batch is answered only when
// they are in it; what the log's consumer made of them is the answer
// (normally accepted; a duplicate or out of order when another replica
// wrote the same unit's samples in between). Results decided before the
// log are counted here; those of the log by its consumer, on every
// replica alike.
func (t *Telemetry) pushLog(ctx context.Context, req *pb.PushRequest, now time.Time, units *ingest.Resolver) (*pb.PushResponse, error) {
	finish, err := t.startLog(ctx, req, now, units)
	if err != nil {
		return nil, err
	}
	return finish(ctx)
}

// startLog checks the batch and starts writing what passes to the log;
// finish waits for the log and builds the answer. units, when not nil,
// is the resolver of the stream req came on. Once startLog has returned,
// neither finish nor the log holds anything of req: the stream may decode
// its next request into it.
func (t *Telemetry) startLog(ctx context.Context, req *pb.PushRequest, now time.Time, units *ingest.Resolver) (finish func(context.Context) (*pb.PushResponse, error), err error) {
	if err := t.checkSize(req); err != nil {
		return nil, err
	}
	var tally ingest.Tally
	results := make([]ingest.Result, len(req.Samples))
	details := make([]string, len(req.Samples))
	smps := make([]ingest.Sample, 0, len(req.Samples))
	idx := make([]int, 0, len(req.Samples))
	var d denials
	caller := access.FromContext(ctx)
	for i, s := range req.Samples {
		// Converted in its place in smps: passed to the log's Check, an
		// interface method, a local sample would move to the heap.
		smps = append(smps, ingest.Sample{})
		smp := &smps[len(smps)-1]
		res, detail, denied := t.convert(caller, s, smp)
		if res == ingest.Accepted {
			res, detail = t.log.Check(units, now, smp)
		}
		d.note(denied, s.UnitId)
		if res == ingest.Accepted {
			idx = append(idx, i)
			continue
		}
		smps = smps[:len(smps)-1]
		results[i], details[i] = res, detail
		tally[res]++
	}
	t.store.Commit(&tally)
	t.report(ctx, &d)
	wait := func(context.Context) ([]ingest.Result, []string, error) { return nil, nil, nil }
	seq := req.Sequence
	if len(smps) > 0 {
		if wait, err = t.log.Append(ctx, now, smps); err != nil {
			return nil, unavailable(seq, err)
		}
	}
	return func(ctx context.Context) (*pb.PushResponse, error) {
		res, det, err := wait(ctx)
		if err != nil {
			return nil, unavailable(seq, err)
		}
		for j, i := range idx {
			results[i], details[i] = res[j], det[j]
		}
		resp := &pb.PushResponse{Sequence: seq}
		for i, res := range results {
			answer(resp, i, res, details[i])
		}
		return resp, nil
	}, nil
}

func unavailable(seq uint64, err error) error {
	return status.Errorf(codes.Unavailable, "batch %d not acknowledged: %v; resend it (samples already written count once)", seq, err)
}

// streamLog is Stream on the durable path: up to streamWindow batches
// are in the log at once, and answered in order as they are applied. A
// request goes back to free once the log has what it needs of it.
func (t *Telemetry) streamLog(st grpc.BidiStreamingServer[pb.PushRequest, pb.PushResponse], reqs <-chan *pb.PushRequest, errc <-chan error, free chan<- *pb.PushRequest) error {
	ctx := st.Context()
	var units ingest.Resolver // this stream's units, each resolved once
	pending := make(chan func(context.Context) (*pb.PushResponse, error), streamWindow)
	sendErr := make(chan error, 1)
	go func() { // answers in order; ends when pending is closed
		var failed error
		dead, cancel := context.WithCancel(ctx)
		cancel()
		for finish := range pending {
			if failed != nil {
				_, _ = finish(dead) // gives up its wait
				continue
			}
			resp, err := finish(ctx)
			if err == nil {
				err = st.Send(resp)
			}
			if err != nil {
				failed = err
				sendErr <- err
			}
		}
		if failed == nil {
			sendErr <- nil
		}
	}()
	// end closes the pipeline and returns the first error of the
	// answers, or err.
	end := func(err error) error {
		close(pending)
		if serr := <-sendErr; serr != nil {
			return serr
		}
		return err
	}
	start := func(req *pb.PushRequest) error {
		finish, err := t.startLog(ctx, req, t.now(), &units)
		if err != nil {
			return err
		}
		select {
		case free <- req: // startLog kept nothing of it
		default:
		}
		select {
		case pending <- finish:
			return nil
		case err := <-sendErr:
			sendErr <- err // for end
			_, _ = finish(ctx)
			return err
		}
	}
	for {
		select {
		case req := <-reqs:
			if err := ctx.Err(); err != nil {
				return end(err)
			}
			if err := start(req); err != nil {
				return end(err)
			}
		case err := <-errc:
			if errors.Is(err, io.EOF) {
				return end(nil)
			}
			return end(err)
		case err := <-sendErr:
			sendErr <- err
			return end(err)
		case <-t.draining:
			select {
			case req := <-reqs:
				if err := start(req); err != nil {
					return end(err)
				}
			default:
			}
			return end(status.Error(codes.Unavailable, "genvelope is shutting down: reconnect and resend any batch not acknowledged"))
		}
	}
}

// FromProto converts s into smp, or returns the reason it cannot be.
func FromProto(s *pb.Sample, smp *ingest.Sample) (ingest.Result, string) {
	smp.UnitID = s.UnitId
	if s.Time != nil {
		if err := s.Time.CheckValid(); err != nil {
			return ingest.RejectOutOfRangeTime, fmt.Sprintf("time (%d s, %d ns since 1970) is outside what a time can hold: %v", s.Time.Seconds, s.Time.Nanos, err)
		}
		smp.Time = s.Time.AsTime()
	}
	smp.PMW, smp.QMvar, smp.VKV = s.PMw, s.QMvar, s.VKv
	if s.FieldA != nil {
		smp.FieldA, smp.HasFieldA = *s.FieldA, true
	}
	if s.FrequencyHz != nil {
		smp.FrequencyHz, smp.HasFreq = *s.FrequencyHz, true
	}
	if s.Coolant != nil {
		smp.Coolant, smp.HasCoolant = *s.Coolant, true
	}
	switch s.Quality {
	case pb.Quality_QUALITY_UNSPECIFIED, pb.Quality_QUALITY_GOOD:
		smp.Quality = ingest.QualityGood
	case pb.Quality_QUALITY_QUESTIONABLE:
		smp.Quality = ingest.QualityQuestionable
	case pb.Quality_QUALITY_INVALID:
		smp.Quality = ingest.QualityInvalid
	default:
		return ingest.RejectInvalidQuality, fmt.Sprintf("quality %d is not a known value", int32(s.Quality))
	}
	return ingest.Accepted, ""
}

func reasonProto(r ingest.Result) pb.RejectReason {
	switch r {
	case ingest.RejectUnknownUnit:
		return pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT
	case ingest.RejectNotFinite:
		return pb.RejectReason_REJECT_REASON_NOT_FINITE
	case ingest.RejectOutOfRange:
		return pb.RejectReason_REJECT_REASON_OUT_OF_RANGE
	case ingest.RejectOutOfOrder:
		return pb.RejectReason_REJECT_REASON_OUT_OF_ORDER
	case ingest.RejectFuture:
		return pb.RejectReason_REJECT_REASON_FUTURE
	case ingest.RejectInvalidQuality:
		return pb.RejectReason_REJECT_REASON_INVALID_QUALITY
	case ingest.RejectMissingTime:
		return pb.RejectReason_REJECT_REASON_MISSING_TIME
	case ingest.RejectOutOfRangeTime:
		return pb.RejectReason_REJECT_REASON_OUT_OF_RANGE_TIME
	case ingest.RejectImplausible:
		return pb.RejectReason_REJECT_REASON_IMPLAUSIBLE
	case ingest.RejectPermissionDenied:
		return pb.RejectReason_REJECT_REASON_PERMISSION_DENIED
	}
	return pb.RejectReason_REJECT_REASON_UNSPECIFIED
}

// optional returns a pointer to x for a proto optional field.
func optional(x float64, ok bool) *float64 {
	if !ok || math.IsNaN(x) {
		return nil
	}
	return &x
}
