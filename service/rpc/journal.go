package rpc

import (
	"context"
	"errors"
	"strings"
	"time"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/journal"
)

// Journal implements JournalService.
type Journal struct {
	pb.UnimplementedJournalServiceServer
	actions ingest.Actions
	journal *journal.Journal // nil when the service keeps none
	now     func() time.Time
}

// NewJournal returns a JournalService over store and j (which may be
// nil: then ListJournal answers FAILED_PRECONDITION).
func NewJournal(store *ingest.Store, j *journal.Journal, now func() time.Time) *Journal {
	return NewJournalWith(ingest.StoreActions{Store: store}, j, now)
}

// NewJournalWith is NewJournal with the thermal actions (ResetThermal,
// DiscardSample) applied through actions: a replicated service writes
// them to its log.
func NewJournalWith(actions ingest.Actions, j *journal.Journal, now func() time.Time) *Journal {
	if now == nil {
		now = time.Now
	}
	return &Journal{actions: actions, journal: j, now: now}
}

// badRequest is INVALID_ARGUMENT with a BadRequest detail naming field.
func badRequest(field, desc string) error {
	st := status.New(codes.InvalidArgument, field+": "+desc)
	if d, err := st.WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{{Field: field, Description: desc}}}); err == nil {
		st = d
	}
	return st.Err()
}

// ListJournal returns one page of journal entries, newest first.
func (j *Journal) ListJournal(ctx context.Context, req *pb.ListJournalRequest) (*pb.ListJournalResponse, error) {
	if j.journal == nil {
		return nil, status.Error(codes.FailedPrecondition, "this service keeps no journal (start it with --journal FILE)")
	}
	var f journal.Filter
	if pf := req.Filter; pf != nil {
		f = journal.Filter{Units: pf.UnitIds, Limits: pf.Limits, Changes: pf.Changes, MinLevel: pf.MinLevel, Operator: pf.Operator}
		for _, l := range pf.Limits {
			if _, ok := alarm.ParseKind(l); !ok && l != "armature" && l != "field" {
				return nil, badRequest("filter.limits", "limit "+quote(l)+" is not an alarm")
			}
		}
		for name, ts := range map[string]*timestamppb.Timestamp{"filter.since": pf.Since, "filter.until": pf.Until} {
			if ts == nil {
				continue
			}
			if err := ts.CheckValid(); err != nil {
				return nil, badRequest(name, err.Error())
			}
		}
		if pf.Since != nil {
			f.Since = pf.Since.AsTime()
		}
		if pf.Until != nil {
			f.Until = pf.Until.AsTime()
		}
	}
	es, next, err := j.journal.Query(f, int(min(req.PageSize, 1<<20)), req.PageToken)
	switch {
	case errors.Is(err, journal.ErrBadToken):
		return nil, badRequest("page_token", strings.TrimPrefix(err.Error(), journal.ErrBadToken.Error()+": "))
	case errors.Is(err, journal.ErrBadFilter):
		field := "filter"
		if req.PageSize > journal.MaxPage {
			field = "page_size"
		}
		return nil, badRequest(field, strings.TrimPrefix(err.Error(), journal.ErrBadFilter.Error()+": "))
	case err != nil:
		return nil, status.Errorf(codes.Internal, "reading the journal: %v", err)
	}
	resp := &pb.ListJournalResponse{NextPageToken: next, Entries: make([]*pb.JournalEntry, len(es))}
	for i := range es {
		resp.Entries[i] = entryProto(&es[i])
	}
	return resp, nil
}

func quote(s string) string { return `"` + s + `"` }

func entryProto(e *journal.Entry) *pb.JournalEntry {
	return &pb.JournalEntry{Seq: e.Seq, Time: timestamppb.New(e.Time), Recorded: timestamppb.New(e.Recorded),
		UnitId: e.Unit, Site: e.Site, Limit: e.Limit, Change: e.Change, Level: e.Level, PreviousLevel: e.Prev,
		Value: e.Value, Threshold: e.Threshold, Actual: e.Actual, LimitValue: e.LimitAt, Units: e.Units,
		Message: e.Message, Operator: e.Operator, LogSeq: e.LogSeq}
}

// ResetThermal clears a unit's thermal accumulators.
func (j *Journal) ResetThermal(ctx context.Context, req *pb.ResetThermalRequest) (*pb.ResetThermalResponse, error) {
	if req.Winding != "" && req.Winding != "armature" && req.Winding != "field" {
		return nil, badRequest("winding", "give armature, field, or nothing for both; got "+quote(req.Winding))
	}
	if err := j.actions.ResetThermal(ctx, req.UnitId, req.Winding, j.now(), req.Operator, req.Reason); err != nil {
		return nil, actionError(err)
	}
	return &pb.ResetThermalResponse{}, nil
}

// DiscardSample discards one recent sample's thermal effect.
func (j *Journal) DiscardSample(ctx context.Context, req *pb.DiscardSampleRequest) (*pb.DiscardSampleResponse, error) {
	if req.Time == nil {
		return nil, badRequest("time", "give the sample's time")
	}
	if err := req.Time.CheckValid(); err != nil {
		return nil, badRequest("time", err.Error())
	}
	if err := j.actions.DiscardSample(ctx, req.UnitId, req.Time.AsTime(), j.now(), req.Operator, req.Reason); err != nil {
		return nil, actionError(err)
	}
	return &pb.DiscardSampleResponse{}, nil
}
