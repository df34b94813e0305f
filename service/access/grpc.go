package access

import (
	"context"
	"strings"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// check is what a method asks of its caller.
type check uint8

const (
	checkNone      check = iota // open to all (health)
	checkAnyUnit                // the role over at least one unit; answers are filtered to the caller's units
	checkUnit                   // the role over the request's unit_id
	checkAnyRole                // any grant at all (reflection)
	checkDenied                 // a method the access file cannot grant
	checkUnitOrAll              // the role over the request's unit_id, or over one unit at least when it is empty (answers filtered)
)

// methodCheck returns the role and check of a gRPC method. A method not
// listed here is denied under an access file.
func methodCheck(fullMethod string) (Role, check) {
	switch fullMethod {
	case pb.TelemetryService_Push_FullMethodName, pb.TelemetryService_Stream_FullMethodName:
		return TelemetryWriter, checkAnyUnit // and each sample (see rpc)
	case pb.FleetService_ListUnits_FullMethodName, pb.AlarmService_ListAlarms_FullMethodName, pb.AlarmService_WatchAlarms_FullMethodName:
		return Viewer, checkAnyUnit
	case pb.FleetService_GetUnit_FullMethodName, pb.FleetService_GetEnvelope_FullMethodName:
		return Viewer, checkUnit
	case pb.AlarmService_AcknowledgeAlarm_FullMethodName, pb.AlarmService_ShelveAlarm_FullMethodName,
		pb.JournalService_ResetThermal_FullMethodName, pb.JournalService_DiscardSample_FullMethodName:
		return Operator, checkUnit
	case pb.JournalService_ListJournal_FullMethodName:
		return Viewer, checkAnyUnit // entries of other units are filtered out
	case pb.CoordinationService_GetCoordination_FullMethodName:
		return Viewer, checkUnitOrAll // one unit, or the caller's units when unit_id is empty
	}
	switch {
	case strings.HasPrefix(fullMethod, "/grpc.health.v1.Health/"):
		return Viewer, checkNone
	case strings.HasPrefix(fullMethod, "/grpc.reflection."):
		return Viewer, checkAnyRole
	}
	return Admin, checkDenied
}

// grpcCaller returns the caller of a gRPC call from its connection.
func (g *Guard) grpcCaller(ctx context.Context) *Caller {
	p, ok := peer.FromContext(ctx)
	if !ok {
		return g.caller(nil, "", "")
	}
	src := ""
	if p.Addr != nil {
		src = p.Addr.String()
	}
	if info, ok := p.AuthInfo.(credentials.TLSInfo); ok {
		return g.FromTLS(&info.State, src)
	}
	return g.FromTLS(nil, src)
}

// allow checks c against a method; it returns the status to answer when
// c may not call it, and counts and audits the refusal.
func (g *Guard) allow(ctx context.Context, c *Caller, method string, req any) error {
	role, chk := methodCheck(method)
	unit := ""
	if r, ok := req.(interface{ GetUnitId() string }); ok {
		unit = r.GetUnitId()
	}
	var ok bool
	switch chk {
	case checkNone:
		return nil
	case checkAnyUnit:
		ok = c.Has(role)
	case checkUnit:
		ok = c.May(role, unit)
	case checkUnitOrAll:
		if unit == "" {
			ok = c.Has(role)
		} else {
			ok, chk = c.May(role, unit), checkUnit
		}
	case checkAnyRole:
		ok = c.rights.all || len(c.rights.grants) > 0
	case checkDenied:
		ok = c.rights.all
	}
	if ok {
		if chk == checkUnit && unit != "" && !c.rights.all && g.fleetKnown {
			if _, exists := g.opts.SiteOf(unit); !exists {
				// A unit not in the fleet gets the answer of a unit
				// outside the scope (below), before the handler reads
				// anything else of the request: the two cannot be told
				// apart by what else a request has wrong.
				if role == Operator {
					g.recordAction(ctx, c, actionName(req, method), clip(unit), status.Error(codes.NotFound, "not in the fleet"))
				}
				return UnknownUnit(c, unit, g.opts.UnitIDs())
			}
		}
		return nil
	}
	reason := DenyReason(c)
	g.Deny(ctx, c, "grpc "+method, clip(unit), reason)
	if chk == checkUnit && unit != "" && c.Has(Viewer) && !c.May(Viewer, unit) {
		// A unit outside the caller's view, read or acted on, is
		// answered as one that does not exist: its existence is not
		// revealed. (One the caller may view but not act on is
		// answered PERMISSION_DENIED: it knows the unit exists.)
		return UnknownUnit(c, unit, g.opts.UnitIDs())
	}
	if reason == ReasonUnauthenticated {
		return status.Error(codes.Unauthenticated, "genvelope: this call needs a client certificate the access file knows")
	}
	if unit != "" {
		return status.Errorf(codes.PermissionDenied, "genvelope: %s may not %s unit %q", c.Who(), role, clip(unit))
	}
	return status.Errorf(codes.PermissionDenied, "genvelope: %s has no %s grant", c.Who(), role)
}

// UnaryInterceptor identifies the caller, checks its rights, records the
// authenticated identity on acknowledge and shelve (in place of the
// typed operator name), audits operator actions, and filters list
// answers to the caller's units.
func (g *Guard) UnaryInterceptor(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
	c := g.grpcCaller(ctx)
	ctx = NewContext(ctx, c)
	if err := g.allow(ctx, c, info.FullMethod, req); err != nil {
		return nil, err
	}
	switch r := req.(type) {
	case *pb.AcknowledgeAlarmRequest:
		r.Operator = operatorName(c, r.Operator)
		resp, err := handler(ctx, req)
		g.recordAction(ctx, c, actionName(req, info.FullMethod), r.UnitId+"/"+clip(r.Limit), err)
		return resp, err
	case *pb.ShelveAlarmRequest:
		r.Operator = operatorName(c, r.Operator)
		r.Reason = Sanitize(r.Reason, 200)
		resp, err := handler(ctx, req)
		g.recordAction(ctx, c, actionName(req, info.FullMethod), r.UnitId+"/"+clip(r.Limit), err)
		return resp, err
	case *pb.ResetThermalRequest:
		r.Operator, r.Reason = operatorName(c, r.Operator), Sanitize(r.Reason, 200)
		resp, err := handler(ctx, req)
		g.recordAction(ctx, c, actionName(req, info.FullMethod), clip(r.UnitId), err)
		return resp, err
	case *pb.DiscardSampleRequest:
		r.Operator, r.Reason = operatorName(c, r.Operator), Sanitize(r.Reason, 200)
		resp, err := handler(ctx, req)
		g.recordAction(ctx, c, actionName(req, info.FullMethod), clip(r.UnitId), err)
		return resp, err
	}
	resp, err := handler(ctx, req)
	if err != nil || c.rights.all {
		return resp, err
	}
	switch r := resp.(type) {
	case *pb.ListUnitsResponse:
		r.Units = visible(c, r.Units, (*pb.Unit).GetId)
	case *pb.ListAlarmsResponse:
		r.Alarms = visible(c, r.Alarms, (*pb.AlarmEvent).GetUnitId)
	case *pb.GetCoordinationResponse:
		r.Units = visible(c, r.Units, (*pb.UnitCoordination).GetUnitId)
	case *pb.ListJournalResponse:
		// Fleet-wide entries (reloads) carry no unit and stay.
		kept := r.Entries[:0]
		for _, e := range r.Entries {
			if e.GetUnitId() == "" || c.May(Viewer, e.GetUnitId()) {
				kept = append(kept, e)
			}
		}
		r.Entries = kept
	}
	return resp, err
}

// UnknownUnit is the answer to a request for a unit that is not in the
// fleet, or that c may not view: NOT_FOUND, naming the units c may view.
func UnknownUnit(c *Caller, id string, ids []string) error {
	var known []string
	for _, u := range ids {
		if c == nil || c.May(Viewer, u) {
			known = append(known, u)
		}
	}
	return status.Errorf(codes.NotFound, "unit %q is not in the fleet; known units: %s", ClipID(id), strings.Join(known, ", "))
}

// ClipID shortens a unit id for a message: at most 64 bytes, cut at a
// character boundary, with an ellipsis when cut.
func ClipID(id string) string {
	const max = 64
	if len(id) <= max {
		return id
	}
	cut := max
	for cut > 0 && !utf8RuneStart(id[cut]) {
		cut--
	}
	return id[:cut] + "…"
}

// visible keeps the items of the units c may view, in place.
func visible[T any](c *Caller, items []T, unit func(T) string) []T {
	kept := items[:0]
	for _, it := range items {
		if c.May(Viewer, unit(it)) {
			kept = append(kept, it)
		}
	}
	return kept
}

// actionName is the audit's name of an operator action.
func actionName(req any, method string) string {
	switch r := req.(type) {
	case *pb.AcknowledgeAlarmRequest:
		return "grpc acknowledge"
	case *pb.ShelveAlarmRequest:
		if r.Duration.AsDuration() == 0 {
			return "grpc unshelve"
		}
		return "grpc shelve"
	case *pb.ResetThermalRequest:
		return "grpc reset thermal"
	case *pb.DiscardSampleRequest:
		return "grpc discard sample"
	}
	return "grpc " + method
}

func (g *Guard) recordAction(ctx context.Context, c *Caller, action, target string, err error) {
	if err != nil {
		g.Record(ctx, c, action, target, OutcomeFailed, status.Convert(err).Message())
		return
	}
	g.Record(ctx, c, action, target, OutcomeDone, "")
}

// operatorName is the name an action is recorded under: the caller's
// identity when it has one, else the typed name, sanitized.
func operatorName(c *Caller, typed string) string {
	if c.Name != "" {
		return c.Name
	}
	return Sanitize(typed, 64)
}

// Sanitize returns s without control characters (and without U+FFFD,
// which stands for bytes that were not UTF-8), trimmed, at most max
// bytes cut at a character boundary.
func Sanitize(s string, max int) string {
	s = strings.TrimSpace(strings.Map(func(r rune) rune {
		if r < 0x20 || (r >= 0x7f && r < 0xa0) || r == 0xfffd || r == 0x2028 || r == 0x2029 || (r >= 0x202a && r <= 0x202e) || (r >= 0x2066 && r <= 0x2069) {
			return -1
		}
		return r
	}, s))
	if len(s) > max {
		cut := max
		for cut > 0 && !utf8RuneStart(s[cut]) {
			cut--
		}
		s = strings.TrimSpace(s[:cut])
	}
	return s
}

func utf8RuneStart(b byte) bool { return b&0xC0 != 0x80 }

// StreamInterceptor identifies the caller of a stream, checks its
// rights, and keeps a watcher's events to the caller's units.
func (g *Guard) StreamInterceptor(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
	c := g.grpcCaller(ss.Context())
	ctx := NewContext(ss.Context(), c)
	if err := g.allow(ctx, c, info.FullMethod, nil); err != nil {
		return err
	}
	return handler(srv, &guardedStream{ServerStream: ss, ctx: ctx, c: c})
}

type guardedStream struct {
	grpc.ServerStream
	ctx context.Context
	c   *Caller
}

func (s *guardedStream) Context() context.Context { return s.ctx }

// SendMsg drops alarm events of units the caller may not see.
func (s *guardedStream) SendMsg(m any) error {
	if w, ok := m.(*pb.WatchAlarmsResponse); ok && !s.c.rights.all && !s.c.May(Viewer, w.GetEvent().GetUnitId()) {
		return nil
	}
	return s.ServerStream.SendMsg(m)
}
