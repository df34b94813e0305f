package rpc

import (
	"context"

	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/coord"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
)

// Coordination implements CoordinationService: the coordination study of
// the fleet being served, the same as `genvelope coordinate`.
type Coordination struct {
	pb.UnimplementedCoordinationServiceServer
	store *ingest.Store
}

// NewCoordination returns a CoordinationService over store.
func NewCoordination(store *ingest.Store) *Coordination { return &Coordination{store: store} }

// GetCoordination studies one unit, or every unit when unit_id is empty.
func (c *Coordination) GetCoordination(ctx context.Context, req *pb.GetCoordinationRequest) (*pb.GetCoordinationResponse, error) {
	fl := c.store.Fleet()
	caller := access.FromContext(ctx)
	var units []*fleet.Unit
	if req.UnitId != "" {
		u := fl.Unit(req.UnitId)
		if u == nil {
			return nil, access.UnknownUnit(caller, req.UnitId, fl.IDs())
		}
		units = []*fleet.Unit{u}
	} else {
		// Every unit the caller may view (all without an access file).
		for _, u := range fl.Units {
			if caller == nil || caller.May(access.Viewer, u.ID) {
				units = append(units, u)
			}
		}
	}
	resp := &pb.GetCoordinationResponse{Caution: fleet.Caution}
	for _, u := range units {
		if err := ctx.Err(); err != nil {
			return nil, status.FromContextError(err).Err()
		}
		if u.Model == nil {
			continue
		}
		resp.Units = append(resp.Units, coordinationProto(coord.StudyUnit(u)))
	}
	return resp, nil
}

func coordinationProto(u coord.Unit) *pb.UnitCoordination {
	out := &pb.UnitCoordination{UnitId: u.Unit}
	for _, c := range u.Checks {
		pc := &pb.CoordinationCheck{Name: c.Name, Margin: c.Margin, MarginUnit: c.MarginUnit, Detail: c.Detail}
		switch c.Status {
		case "pass":
			pc.Status = pb.CoordinationStatus_COORDINATION_STATUS_PASS
		case "fail":
			pc.Status = pb.CoordinationStatus_COORDINATION_STATUS_FAIL
		default:
			pc.Status = pb.CoordinationStatus_COORDINATION_STATUS_NOT_APPLICABLE
		}
		if w := c.Worst; w != nil {
			v, p := w.VPU, w.PMW
			pc.WorstVPu, pc.WorstPMw = &v, &p
		}
		out.Checks = append(out.Checks, pc)
	}
	return out
}
