package rpc

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
)

// DefaultWatchBuffer is how many events a watcher may fall behind before
// it is ended.
const DefaultWatchBuffer = 1024

// MaxShelve is the longest an alarm may be shelved in one call, the
// same on every path.
const MaxShelve = ingest.MaxShelve

// Alarms implements AlarmService.
type Alarms struct {
	pb.UnimplementedAlarmServiceServer
	store    *ingest.Store
	actions  ingest.Actions
	buffer   int
	now      func() time.Time
	draining <-chan struct{}
}

// AlarmOptions configure an Alarms server.
type AlarmOptions struct {
	Buffer   int              // events a watcher may lag; default DefaultWatchBuffer
	Now      func() time.Time // wall clock; default time.Now
	Draining <-chan struct{}  // closed at shutdown: watches end with UNAVAILABLE
	// Actions apply acknowledgements and shelves; default the store
	// itself (a replicated service passes its log).
	Actions ingest.Actions
}

// NewAlarms returns an AlarmService over store.
func NewAlarms(store *ingest.Store, o AlarmOptions) *Alarms {
	if o.Buffer <= 0 {
		o.Buffer = DefaultWatchBuffer
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Actions == nil {
		o.Actions = ingest.StoreActions{Store: store}
	}
	return &Alarms{store: store, actions: o.Actions, buffer: o.Buffer, now: o.Now, draining: o.Draining}
}

// filter returns the predicate of f.
func filter(f *pb.AlarmFilter) func(*alarm.Event) bool {
	if f == nil {
		return nil
	}
	minLevel := alarm.Normal
	if f.MinLevel > pb.AlarmLevel_ALARM_LEVEL_NORMAL {
		minLevel = alarm.Level(f.MinLevel - pb.AlarmLevel_ALARM_LEVEL_NORMAL)
	}
	units, sites := f.UnitIds, f.Sites
	return func(e *alarm.Event) bool {
		if len(units) > 0 && !slices.Contains(units, e.Unit) {
			return false
		}
		if len(sites) > 0 && !slices.Contains(sites, e.Site) {
			return false
		}
		return e.Level >= minLevel || e.Prev >= minLevel
	}
}

// WatchAlarms streams the active alarms, then every change.
func (a *Alarms) WatchAlarms(req *pb.WatchAlarmsRequest, st grpc.ServerStreamingServer[pb.WatchAlarmsResponse]) error {
	ctx := st.Context()
	keep := filter(req.Filter)
	// Subscribe before taking the present state, so that no change falls
	// between the two; a change may then be seen twice, never missed.
	w := a.store.Hub().Watch(a.buffer, keep)
	defer w.Close()
	// Headers now: the client knows the watch is established (and not
	// refused) before the first event.
	if err := st.SendHeader(nil); err != nil {
		return err
	}
	errc := make(chan error, 1)
	// Sending happens on a goroutine of its own so that a watcher that
	// stops reading (and so blocks Send) can still be ended on overflow;
	// it ends with the stream.
	go func() {
		for _, ev := range a.store.Active() {
			if keep != nil && !keep(&ev) {
				continue
			}
			if err := st.Send(&pb.WatchAlarmsResponse{Event: eventProto(&ev), Initial: true}); err != nil {
				errc <- err
				return
			}
		}
		for {
			select {
			case ev := <-w.C:
				if err := st.Send(&pb.WatchAlarmsResponse{Event: eventProto(&ev)}); err != nil {
					errc <- err
					return
				}
			case <-ctx.Done():
				return
			}
		}
	}()
	select {
	case err := <-errc:
		return err
	case <-w.Overflowed:
		return status.Errorf(codes.ResourceExhausted, "alarm watch fell more than %d events behind and was ended; reconnect to get the present state", a.buffer)
	case <-ctx.Done():
		return ctx.Err()
	case <-a.draining:
		return status.Error(codes.Unavailable, "genvelope is shutting down: reconnect to watch again")
	}
}

// ListAlarms returns the active alarms.
func (a *Alarms) ListAlarms(ctx context.Context, req *pb.ListAlarmsRequest) (*pb.ListAlarmsResponse, error) {
	keep := filter(req.Filter)
	resp := &pb.ListAlarmsResponse{}
	for _, ev := range a.store.Active() {
		if keep == nil || keep(&ev) {
			resp.Alarms = append(resp.Alarms, eventProto(&ev))
		}
	}
	return resp, nil
}

// AcknowledgeAlarm acknowledges one active alarm.
func (a *Alarms) AcknowledgeAlarm(ctx context.Context, req *pb.AcknowledgeAlarmRequest) (*pb.AcknowledgeAlarmResponse, error) {
	k, err := kindOf(req.Limit)
	if err != nil {
		return nil, err
	}
	if err := a.actions.Acknowledge(ctx, req.UnitId, k, a.now(), req.Operator); err != nil {
		return nil, actionError(err)
	}
	return &pb.AcknowledgeAlarmResponse{}, nil
}

// ShelveAlarm shelves or unshelves one alarm.
func (a *Alarms) ShelveAlarm(ctx context.Context, req *pb.ShelveAlarmRequest) (*pb.ShelveAlarmResponse, error) {
	k, err := kindOf(req.Limit)
	if err != nil {
		return nil, err
	}
	var d time.Duration
	if req.Duration != nil {
		if err := req.Duration.CheckValid(); err != nil {
			return nil, status.Errorf(codes.InvalidArgument, "duration: %v", err)
		}
		d = req.Duration.AsDuration()
	}
	if d < 0 || d > MaxShelve {
		return nil, status.Errorf(codes.InvalidArgument, "duration %s is outside 0 to %s (0 lifts the shelf)", d, MaxShelve)
	}
	now := a.now()
	var until time.Time
	if d > 0 {
		until = now.Add(d)
	}
	by := req.Operator
	if req.Reason != "" {
		by += " (" + req.Reason + ")"
	}
	if err := a.actions.Shelve(ctx, req.UnitId, k, until, now, by); err != nil {
		return nil, actionError(err)
	}
	resp := &pb.ShelveAlarmResponse{}
	if !until.IsZero() {
		resp.ShelvedUntil = timestamppb.New(until)
	}
	return resp, nil
}

func kindOf(name string) (alarm.Kind, error) {
	k, ok := alarm.ParseKind(name)
	if !ok {
		var names []string
		for _, k := range alarm.Kinds() {
			names = append(names, k.String())
		}
		return 0, status.Errorf(codes.InvalidArgument, "limit %q is not an alarm; alarms: %v", ingest.ClipID(name), names)
	}
	return k, nil
}

func actionError(err error) error {
	switch {
	case errors.Is(err, ingest.ErrUnknownUnit):
		return status.Error(codes.NotFound, err.Error())
	case errors.Is(err, ingest.ErrNotActive):
		return status.Error(codes.FailedPrecondition, err.Error())
	case errors.Is(err, ingest.ErrUnknownSample):
		return status.Error(codes.NotFound, err.Error())
	case errors.Is(err, ingest.ErrNoOperator):
		return badRequest("operator", "an operator name is required: who acts is recorded in the journal")
	case errors.Is(err, ingest.ErrUnavailable):
		return status.Error(codes.Unavailable, err.Error())
	}
	return status.Error(codes.Internal, fmt.Sprintf("alarm action: %v", err))
}

func levelProto(l alarm.Level) pb.AlarmLevel {
	return pb.AlarmLevel(l) + pb.AlarmLevel_ALARM_LEVEL_NORMAL
}

func eventProto(e *alarm.Event) *pb.AlarmEvent {
	out := &pb.AlarmEvent{
		UnitId: e.Unit, Site: e.Site, Limit: e.Kind.String(), Change: pb.AlarmChange(e.Change) + pb.AlarmChange_ALARM_CHANGE_LEVEL,
		Level: levelProto(e.Level), PreviousLevel: levelProto(e.Prev), Time: timestamppb.New(e.Time),
		Value: e.Value, Threshold: e.Threshold, Acknowledged: e.Acknowledged, Message: e.Message,
		Actual: e.Actual, LimitValue: e.LimitAt, Units: e.Units, Operator: e.Operator,
	}
	if !e.Shelved.IsZero() {
		out.ShelvedUntil = timestamppb.New(e.Shelved)
	}
	return out
}
