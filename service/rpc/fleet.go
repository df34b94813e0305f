package rpc

import (
	"context"
	"math"
	"slices"
	"strings"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/report"
)

// Fleet implements FleetService.
type Fleet struct {
	pb.UnimplementedFleetServiceServer
	store *ingest.Store
}

// NewFleet returns a FleetService over store.
func NewFleet(store *ingest.Store) *Fleet { return &Fleet{store: store} }

// DefaultEnvelopePoints and MaxEnvelopePoints bound GetEnvelope.
const (
	DefaultEnvelopePoints = 41
	MaxEnvelopePoints     = 2001
)

// ListUnits lists every unit of the fleet being served.
func (f *Fleet) ListUnits(ctx context.Context, _ *pb.ListUnitsRequest) (*pb.ListUnitsResponse, error) {
	fl := f.store.Fleet()
	resp := &pb.ListUnitsResponse{Units: make([]*pb.Unit, 0, len(fl.Units))}
	for _, u := range fl.Units {
		resp.Units = append(resp.Units, unitProto(u))
	}
	slices.SortFunc(resp.Units, func(a, b *pb.Unit) int { return strings.Compare(a.Id, b.Id) })
	return resp, nil
}

// GetUnit returns one unit, its latest sample and the evaluation of it.
func (f *Fleet) GetUnit(ctx context.Context, req *pb.GetUnitRequest) (*pb.GetUnitResponse, error) {
	u, err := f.unit(ctx, req.UnitId)
	if err != nil {
		return nil, err
	}
	v := u.View()
	resp := &pb.GetUnitResponse{Unit: unitProto(v.Config)}
	if v.HasSample {
		resp.Latest = sampleProto(&v.Latest)
		ev := report.New(v.Config, v.Point, &v.Eval)
		ev.SetRotorMode(v.Config, v.Point)
		resp.Evaluation = EvaluationProto(ev)
		resp.Received = timestamppb.New(v.Received)
	}
	resp.DataState, resp.ThermalUnknown, resp.LatestSuspect = v.Data.String(), v.ThermalUnknown, v.Suspect
	resp.ArmatureThermalUsedRatio = v.Armature.Used(limits.ArmatureK)
	resp.FieldThermalUsedRatio = v.Field.Used(limits.FieldK)
	if t, ok := v.Armature.TimeLeft(v.XArmature, limits.ArmatureK); ok {
		resp.ArmatureThermalTimeLeftS = &t
	}
	if t, ok := v.Field.TimeLeft(v.XField, limits.FieldK); ok {
		resp.FieldThermalTimeLeftS = &t
	}
	return resp, nil
}

// GetEnvelope returns a unit's envelope at the requested voltage and
// coolant, by default those of its latest sample.
func (f *Fleet) GetEnvelope(ctx context.Context, req *pb.GetEnvelopeRequest) (*pb.GetEnvelopeResponse, error) {
	u, err := f.unit(ctx, req.UnitId)
	if err != nil {
		return nil, err
	}
	v := u.View()
	cfg := v.Config
	vPU := 1.0
	if v.HasSample {
		vPU = cfg.Base.VoltagePU(v.Latest.VKV)
	}
	switch x := req.Voltage.(type) {
	case *pb.GetEnvelopeRequest_VKv:
		vPU = cfg.Base.VoltagePU(x.VKv)
	case *pb.GetEnvelopeRequest_VPu:
		vPU = x.VPu
	}
	if !(vPU >= 0.5 && vPU <= 1.5) {
		return nil, status.Errorf(codes.InvalidArgument, "voltage %.4g pu is outside the 0.5 to 1.5 pu an envelope is drawn for", vPU)
	}
	coolant, hasCoolant := 0.0, false
	if v.HasSample && v.Latest.HasCoolant {
		coolant, hasCoolant = v.Latest.Coolant, true
	}
	if req.Coolant != nil {
		if math.IsNaN(*req.Coolant) || math.IsInf(*req.Coolant, 0) {
			return nil, status.Errorf(codes.InvalidArgument, "coolant %v is not a finite number", *req.Coolant)
		}
		coolant, hasCoolant = *req.Coolant, true
	}
	hasCoolant = hasCoolant && cfg.Coolant != nil
	n := int(req.Points)
	switch {
	case n == 0:
		n = DefaultEnvelopePoints
	case n > MaxEnvelopePoints:
		return nil, status.Errorf(codes.InvalidArgument, "points %d is more than the %d an envelope may have", n, MaxEnvelopePoints)
	}
	pts := cfg.Model.Envelope(vPU, coolant, hasCoolant, n)
	resp := &pb.GetEnvelopeResponse{UnitId: cfg.ID, VPu: vPU, Points: make([]*pb.EnvelopePoint, len(pts))}
	if hasCoolant {
		resp.Coolant = &coolant
	}
	for i, ep := range pts {
		p := report.NewEnvelopePoint(ep, cfg.Base.MVA)
		resp.Points[i] = &pb.EnvelopePoint{
			PMw: p.PMW, QMaxMvar: p.QMaxMvar, QMinMvar: p.QMinMvar,
			QMaxLimit: limitProto(p.QMaxLimit), QMinLimit: limitProto(p.QMinLimit),
			QFieldMvar: p.QFieldMvar, QArmatureMvar: p.QArmatureUpMvar, QStabilityMvar: p.QStabilityMvar,
			QPracticalStabilityMvar: p.QPracticalStabilityMvar, QEndRegionMvar: p.QEndRegionMvar,
			QUelMvar: p.QUELMvar,
		}
	}
	return resp, nil
}

func (f *Fleet) unit(ctx context.Context, id string) (*ingest.Unit, error) {
	if id == "" {
		return nil, status.Error(codes.InvalidArgument, "unit_id is empty")
	}
	u := f.store.Unit(id)
	if u == nil {
		// Only the units the caller may view are named.
		return nil, access.UnknownUnit(access.FromContext(ctx), id, f.store.Fleet().IDs())
	}
	return u, nil
}

func unitProto(u *fleet.Unit) *pb.Unit {
	rotor := pb.Rotor_ROTOR_ROUND
	if u.Machine.Rotor == limits.Salient {
		rotor = pb.Rotor_ROTOR_SALIENT
	}
	return &pb.Unit{
		Id: u.ID, Name: u.Name, Site: u.Site, Rotor: rotor,
		RatedMva: u.Rating.MVA, RatedKv: u.Rating.KV, PowerFactor: u.Rating.PowerFactor,
		FrequencyHz: u.Rating.FrequencyHz, PMaxMw: u.PrimeMover.PMaxMW, PMinMw: u.PrimeMover.PMinMW,
		IfagA: u.Field.AirGapA, RatedFieldA: u.Model.RatedFieldCurrent() * u.Field.AirGapA,
		StabilityBasis: basisProto(u.Stability.Basis),
	}
}

func basisProto(b limits.Basis) pb.StabilityBasis {
	switch b {
	case limits.BasisManual:
		return pb.StabilityBasis_STABILITY_BASIS_MANUAL
	case limits.BasisAVR:
		return pb.StabilityBasis_STABILITY_BASIS_AVR
	}
	return pb.StabilityBasis_STABILITY_BASIS_UNSPECIFIED
}

func sampleProto(s *ingest.Sample) *pb.Sample {
	q := pb.Quality_QUALITY_GOOD
	if s.Quality == ingest.QualityQuestionable {
		q = pb.Quality_QUALITY_QUESTIONABLE
	}
	return &pb.Sample{
		UnitId: s.UnitID, Time: timestamppb.New(s.Time), PMw: s.PMW, QMvar: s.QMvar, VKv: s.VKV,
		FieldA: optional(s.FieldA, s.HasFieldA), FrequencyHz: optional(s.FrequencyHz, s.HasFreq),
		Coolant: optional(s.Coolant, s.HasCoolant), Quality: q,
	}
}

// limitProto returns the wire enum of the limit named name (a name of
// report's limit table): LIMIT_ and the name in capitals.
func limitProto(name *string) pb.Limit {
	if name == nil {
		return pb.Limit_LIMIT_UNSPECIFIED
	}
	li, ok := report.LimitNamed(*name)
	if !ok {
		return pb.Limit_LIMIT_UNSPECIFIED
	}
	return pb.Limit(pb.Limit_value["LIMIT_"+strings.ToUpper(li.Name)])
}

func zoneProto(z string) pb.Zone {
	switch z {
	case "A":
		return pb.Zone_ZONE_A
	case "B":
		return pb.Zone_ZONE_B
	case "outside":
		return pb.Zone_ZONE_OUTSIDE
	}
	return pb.Zone_ZONE_UNSPECIFIED
}

// EvaluationProto converts a report to its wire form.
func EvaluationProto(e *report.Evaluation) *pb.Evaluation {
	out := &pb.Evaluation{
		VPu: e.VPU, ArmatureCurrentPu: val(e.ArmatureCurrentPU), FieldCurrentModelA: val(e.FieldCurrentModelA),
		LoadAngleDeg: val(e.LoadAngleDeg), QMaxMvar: e.QMaxMvar, QMaxLimit: limitProto(e.QMaxLimit),
		QMinMvar: e.QMinMvar, QMinLimit: limitProto(e.QMinLimit), QStabilityMvar: e.QStabilityMvar,
		QPracticalStabilityMvar: e.QPracticalStabilityMvar, QFieldMvar: e.QFieldMvar,
		QArmatureUpMvar: e.QArmatureUpMvar, QArmatureDownMvar: e.QArmatureDownMvar,
		QEndRegionMvar: e.QEndRegionMvar, PMaxMw: e.PMaxMW, QHeadroomUpMvar: e.QHeadroomUpMvar,
		QHeadroomDownMvar: e.QHeadroomDownMvar, BindingLimit: limitProto(e.BindingLimit),
		Feasible: e.Feasible, InfeasibleLimit: limitProto(e.InfeasibleLimit), Zone: zoneProto(e.Zone),
		VoltsPerHertzPu: val(e.VoltsPerHertzPU), CriticalClearingTimeS: e.CriticalClearingTimeS,
		CoolantOutsideTable:  e.CoolantOutsideTable,
		ArmatureRatingFactor: e.ArmatureRatingFactor, FieldRatingFactor: e.FieldRatingFactor,
		QUelMvar: e.QUELMvar,
	}
	if m := e.RotorMode; m != nil {
		out.RotorMode = &pb.RotorMode{FrequencyHz: m.FrequencyHz, DampingRatio: m.DampingRatio}
	}
	for _, l := range limits.Limits() {
		name := report.LimitOf(l).Name
		out.Margins = append(out.Margins, &pb.Margin{Limit: limitProto(&name), Ratio: e.Margins[name]})
	}
	return out
}

func val(x *float64) float64 {
	if x == nil {
		return 0
	}
	return *x
}
