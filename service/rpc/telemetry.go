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
	// Denied, when set, hears of the samples of one request refused
	// because the caller (access.FromContext) may not push for their
	// units: how many, and the first such unit.
	Denied func(ctx context.Context, n int, unitID string)
}

// NewTelemetry returns a TelemetryService over store.
func NewTelemetry(store *ingest.Store, o TelemetryOptions) *Telemetry {
	if o.MaxBatch <= 0 {
		o.MaxBatch = DefaultMaxBatch
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	return &Telemetry{store: store, maxBatch: o.MaxBatch, now: o.Now, draining: o.Draining, denied: o.Denied}
}

// Push takes one batch.
func (t *Telemetry) Push(ctx context.Context, req *pb.PushRequest) (*pb.PushResponse, error) {
	return t.push(ctx, req)
}

// Stream takes batches and answers each, in order.
func (t *Telemetry) Stream(st grpc.BidiStreamingServer[pb.PushRequest, pb.PushResponse]) error {
	ctx := st.Context()
	reqs := make(chan *pb.PushRequest)
	errc := make(chan error, 1)
	// Receive on a goroutine of its own so that a drain can end the
	// stream while the client is idle; it ends when the stream does.
	go func() {
		for {
			req, err := st.Recv()
			if err != nil {
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
	answer := func(req *pb.PushRequest) error {
		resp, err := t.push(ctx, req)
		if err != nil {
			return err
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

func (t *Telemetry) push(ctx context.Context, req *pb.PushRequest) (*pb.PushResponse, error) {
	if n := len(req.Samples); n > t.maxBatch {
		st := status.New(codes.InvalidArgument, fmt.Sprintf("batch %d has %d samples, more than the limit of %d: split it", req.Sequence, n, t.maxBatch))
		if d, err := st.WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{{
			Field:       "samples",
			Description: fmt.Sprintf("at most %d samples per request, got %d", t.maxBatch, n),
		}}}); err == nil {
			st = d
		}
		return nil, st.Err()
	}
	now := t.now()
	resp := &pb.PushResponse{Sequence: req.Sequence}
	var tally ingest.Tally
	caller := access.FromContext(ctx) // nil: no access control
	denied, deniedUnit := 0, ""
	for i, s := range req.Samples {
		var smp ingest.Sample
		res, detail := fromProto(s, &smp)
		switch {
		case caller != nil && !caller.Allows(s.UnitId):
			// Judged first, so that a writer learns nothing of units it
			// may not push for.
			res, detail = ingest.RejectPermissionDenied, "this identity may not push samples for the unit"
			if denied++; denied == 1 {
				deniedUnit = s.UnitId
			}
		case res == ingest.Accepted:
			res, detail = t.store.Accept(now, &smp)
		case t.store.Unit(s.UnitId) == nil:
			// The unit is the first thing a sample is judged by.
			res, detail = ingest.RejectUnknownUnit, fmt.Sprintf("unit %q is not in the fleet file", ingest.ClipID(s.UnitId))
		}
		tally[res]++
		switch res {
		case ingest.Accepted:
			resp.Accepted++
		case ingest.Duplicate:
			resp.Duplicates++
		default:
			resp.Rejected = append(resp.Rejected, &pb.Rejection{Index: uint32(i), Reason: reasonProto(res), Detail: detail})
		}
	}
	t.store.Commit(&tally)
	if denied > 0 && t.denied != nil {
		t.denied(ctx, denied, deniedUnit)
	}
	return resp, nil
}

// fromProto converts s into smp, or returns the reason it cannot be.
func fromProto(s *pb.Sample, smp *ingest.Sample) (ingest.Result, string) {
	smp.UnitID = s.UnitId
	if s.Time != nil {
		if err := s.Time.CheckValid(); err != nil {
			return ingest.RejectOutOfRange, fmt.Sprintf("time: %v", err)
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
