package server_test

import (
	"cmp"
	"math"
	"slices"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/report"
	"github.com/genvelope/genvelope/service/rpc"
	"github.com/genvelope/genvelope/service/server"
)

// ListUnits gives every unit of the fleet file, ordered by id, with its
// nameplate as the file states it.
func TestListUnits(t *testing.T) {
	r := start(t, server.Config{})
	resp, err := r.fleet.ListUnits(ctxT(t), &pb.ListUnitsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	// Nameplates as written in deploy/examples/fleet.yaml; rated_field_a
	// is the file's field.rated_a, given for each unit there.
	want := []*pb.Unit{
		{Id: "brindle-gt3", Name: "Brindle Flats gas turbine 3", Site: "brindle-flats", Rotor: pb.Rotor_ROTOR_ROUND,
			RatedMva: 160, RatedKv: 15, PowerFactor: 0.85, FrequencyHz: 50, PMaxMw: 136, PMinMw: 40, IfagA: 520, RatedFieldA: 1610,
			StabilityBasis: pb.StabilityBasis_STABILITY_BASIS_AVR},
		{Id: "harrowmere-1", Name: "Harrowmere unit 1", Site: "harrowmere", Rotor: pb.Rotor_ROTOR_ROUND,
			RatedMva: 390, RatedKv: 20, PowerFactor: 0.85, FrequencyHz: 50, PMaxMw: 335, PMinMw: 120, IfagA: 1050, RatedFieldA: 3150,
			StabilityBasis: pb.StabilityBasis_STABILITY_BASIS_AVR},
		{Id: "larchwater-2", Name: "Larchwater unit 2", Site: "larchwater", Rotor: pb.Rotor_ROTOR_SALIENT,
			RatedMva: 120, RatedKv: 13.8, PowerFactor: 0.9, FrequencyHz: 50, PMaxMw: 110, PMinMw: 20, IfagA: 680, RatedFieldA: 1320,
			StabilityBasis: pb.StabilityBasis_STABILITY_BASIS_AVR},
	}
	var ids []string
	for _, u := range resp.Units {
		ids = append(ids, u.Id)
	}
	if !slices.IsSorted(ids) {
		t.Errorf("ListUnits order %v: fleet.proto says the units are ordered by id", ids)
	}
	slices.SortFunc(resp.Units, func(a, b *pb.Unit) int { return cmp.Compare(a.Id, b.Id) })
	if len(resp.Units) != len(want) {
		t.Fatalf("%d units, want %d", len(resp.Units), len(want))
	}
	for i, u := range resp.Units {
		if d := approxEqual(u.ProtoReflect(), want[i].ProtoReflect(), 1e-9, u.Id); d != "" {
			t.Error(d)
		}
	}
}

// GetUnit before and after a sample; its evaluation is the engine's,
// computed here directly from the fleet file.
func TestGetUnit(t *testing.T) {
	r := start(t, server.Config{})
	ctx := ctxT(t)
	fl := loadFleet(t, exampleFleet)

	for _, tc := range []struct {
		id   string
		code codes.Code
	}{
		{"nowhere-9", codes.NotFound},
		{"", codes.InvalidArgument},
	} {
		if _, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: tc.id}); status.Code(err) != tc.code {
			t.Errorf("GetUnit(%q): %v, want %v", tc.id, err, tc.code)
		}
	}

	empty, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: "harrowmere-1"})
	if err != nil {
		t.Fatal(err)
	}
	if empty.Unit.GetId() != "harrowmere-1" || empty.Latest != nil || empty.Evaluation != nil || empty.Received != nil {
		t.Errorf("before any sample: %v, want the unit only", empty)
	}

	at := time.Now().Add(-time.Minute).Truncate(time.Millisecond)
	for _, tc := range []struct {
		name string
		s    *pb.Sample
	}{
		{"round rotor, with field current, frequency and coolant", &pb.Sample{UnitId: "harrowmere-1", PMw: 280, QMvar: 110, VKv: 20.4,
			FieldA: f64(2600), FrequencyHz: f64(49.9), Coolant: f64(350), Quality: pb.Quality_QUALITY_GOOD}},
		{"round rotor, underexcited, coolant outside the table", &pb.Sample{UnitId: "harrowmere-1", PMw: 200, QMvar: -80, VKv: 19.6,
			Coolant: f64(450)}},
		{"salient rotor, questionable field current", &pb.Sample{UnitId: "larchwater-2", PMw: 90, QMvar: 30, VKv: 13.9,
			FieldA: f64(1100), Quality: pb.Quality_QUALITY_QUESTIONABLE}},
		{"air-cooled, cold day", &pb.Sample{UnitId: "brindle-gt3", PMw: 130, QMvar: 70, VKv: 15.2, Coolant: f64(-5)}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			at = at.Add(time.Second)
			tc.s.Time = ts(at)
			before := time.Now()
			resp, err := r.tel.Push(ctx, &pb.PushRequest{Samples: []*pb.Sample{tc.s}})
			if err != nil || resp.Accepted != 1 {
				t.Fatalf("push: %v, %v", resp, err)
			}
			after := time.Now()
			got, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: tc.s.UnitId})
			if err != nil {
				t.Fatal(err)
			}
			wantLatest := proto.Clone(tc.s).(*pb.Sample)
			if wantLatest.Quality == pb.Quality_QUALITY_UNSPECIFIED {
				wantLatest.Quality = pb.Quality_QUALITY_GOOD // unspecified counts as good (types.proto)
			}
			if !proto.Equal(got.Latest, wantLatest) {
				t.Errorf("latest %v, want %v", got.Latest, wantLatest)
			}
			if rc := got.Received.AsTime(); rc.Before(before.Add(-time.Second)) || rc.After(after.Add(time.Second)) {
				t.Errorf("received %v, not around the push (%v to %v)", rc, before, after)
			}

			// The reference: the engine, called directly on the sample in
			// per unit of the unit's own base.
			u := fl.Unit(tc.s.UnitId)
			b := u.Base
			pt := limits.Point{P: b.PowerPU(tc.s.PMw), Q: b.PowerPU(tc.s.QMvar), V: b.VoltagePU(tc.s.VKv)}
			if tc.s.FieldA != nil {
				// A questionable measurement, or one beyond the mismatch alarm's
				// warning from the model, counts only when it is the larger.
				pt.Ifd, pt.IfdMeasured = b.FieldPU(*tc.s.FieldA), true
				pt.IfdDoubtful = tc.s.Quality == pb.Quality_QUALITY_QUESTIONABLE
				pt.IfdMismatch = u.Alarms[alarm.FieldCurrentMismatch].Warning
			}
			if tc.s.FrequencyHz != nil {
				pt.F = b.FrequencyPU(*tc.s.FrequencyHz)
			}
			if tc.s.Coolant != nil {
				pt.Coolant, pt.HasCoolant = *tc.s.Coolant, true
			}
			// With a hint, as the service evaluates samples: on the avr basis
			// that reads the stability limit from the unit's table, which the
			// answer must match exactly; that in turn within 0.002 pu of the
			// direct computation (Evaluate without a hint, limits' contract).
			var h limits.Hint
			res := u.Model.Evaluate(pt, &h)
			direct := u.Model.Evaluate(pt, nil)
			for _, x := range [][2]limits.Bound{{res.Stability, direct.Stability}, {res.Practical, direct.Practical},
				{res.StabilityTop, direct.StabilityTop}, {res.QMax, direct.QMax}, {res.QMin, direct.QMin}} {
				if x[0].OK != x[1].OK || math.Abs(x[0].V-x[1].V) > 0.002 {
					t.Errorf("the service's path %+v, the direct computation %+v (pu; the contract is 0.002 pu)", x[0], x[1])
				}
			}
			e := report.New(u, pt, &res)
			e.SetRotorMode(u, pt)
			want := rpc.EvaluationProto(e)
			if d := approxEqual(got.Evaluation.ProtoReflect(), want.ProtoReflect(), 1e-9, "evaluation"); d != "" {
				t.Error(d)
			}

			// Checks against definitions outside the code.
			ev := got.Evaluation
			vpu := tc.s.VKv / b.KV
			// Per-unit armature current |S|/V (S = √3·V·I, per unit on
			// the machine base; Kundur, Power System Stability and
			// Control, 1994, §3.1 and §5.4.1).
			iWant := math.Hypot(tc.s.PMw, tc.s.QMvar) / b.MVA / vpu
			if !closeTo(ev.VPu, vpu, 1e-12) || !closeTo(ev.ArmatureCurrentPu, iWant, 1e-12) {
				t.Errorf("v_pu %g, armature current %g pu; want %g, %g", ev.VPu, ev.ArmatureCurrentPu, vpu, iWant)
			}
			// Headroom is q_max - q and q - q_min (telemetry bounds in
			// types.proto, Evaluation.q_headroom_*).
			if ev.QMaxMvar != nil && (ev.QHeadroomUpMvar == nil || !closeTo(*ev.QHeadroomUpMvar, *ev.QMaxMvar-tc.s.QMvar, 1e-9)) {
				t.Errorf("headroom up %v with q_max %g, q %g", ev.QHeadroomUpMvar, *ev.QMaxMvar, tc.s.QMvar)
			}
			if ev.QMinMvar != nil && (ev.QHeadroomDownMvar == nil || !closeTo(*ev.QHeadroomDownMvar, tc.s.QMvar-*ev.QMinMvar, 1e-9)) {
				t.Errorf("headroom down %v with q_min %g, q %g", ev.QHeadroomDownMvar, *ev.QMinMvar, tc.s.QMvar)
			}
			// Volts per hertz against 1.05 pu continuous (IEEE Std
			// C37.102-2006 §4.5.4; IEEE Std C50.13-2014 §4.1.5).
			f := 1.0
			if tc.s.FrequencyHz != nil {
				f = *tc.s.FrequencyHz / b.FrequencyHz
			}
			if m := marginOf(ev, pb.Limit_LIMIT_VOLTS_PER_HERTZ); m == nil || !closeTo(*m, 1-vpu/f/1.05, 1e-12) {
				t.Errorf("volts-per-hertz margin %v, want %g", m, 1-vpu/f/1.05)
			}
			var order []pb.Limit
			for _, m := range ev.Margins {
				order = append(order, m.Limit)
			}
			wantOrder := []pb.Limit{pb.Limit_LIMIT_ARMATURE, pb.Limit_LIMIT_FIELD, pb.Limit_LIMIT_STABILITY,
				pb.Limit_LIMIT_END_REGION, pb.Limit_LIMIT_PRIME_MOVER, pb.Limit_LIMIT_VOLTS_PER_HERTZ, pb.Limit_LIMIT_UEL}
			if !slices.Equal(order, wantOrder) {
				t.Errorf("margins for %v, want one per limit in enum order %v", order, wantOrder)
			}
		})
	}
}

// GetEnvelope: defaults, explicit voltage and coolant, and the requests
// it refuses.
func TestGetEnvelope(t *testing.T) {
	r := start(t, server.Config{})
	ctx := ctxT(t)
	for _, tc := range []struct {
		name string
		req  *pb.GetEnvelopeRequest
		code codes.Code
	}{
		{"unknown unit", &pb.GetEnvelopeRequest{UnitId: "nowhere-9"}, codes.NotFound},
		{"no unit", &pb.GetEnvelopeRequest{}, codes.InvalidArgument},
		{"0 kV", &pb.GetEnvelopeRequest{UnitId: "larchwater-2", Voltage: &pb.GetEnvelopeRequest_VKv{VKv: 0}}, codes.InvalidArgument},
		{"-13.8 kV", &pb.GetEnvelopeRequest{UnitId: "larchwater-2", Voltage: &pb.GetEnvelopeRequest_VKv{VKv: -13.8}}, codes.InvalidArgument},
		{"3 pu", &pb.GetEnvelopeRequest{UnitId: "larchwater-2", Voltage: &pb.GetEnvelopeRequest_VPu{VPu: 3}}, codes.InvalidArgument},
		{"NaN pu", &pb.GetEnvelopeRequest{UnitId: "larchwater-2", Voltage: &pb.GetEnvelopeRequest_VPu{VPu: math.NaN()}}, codes.InvalidArgument},
		{"NaN coolant", &pb.GetEnvelopeRequest{UnitId: "harrowmere-1", Coolant: f64(math.NaN())}, codes.InvalidArgument},
		{"too many points", &pb.GetEnvelopeRequest{UnitId: "larchwater-2", Points: rpc.MaxEnvelopePoints + 1}, codes.InvalidArgument},
	} {
		if _, err := r.fleet.GetEnvelope(ctx, tc.req); status.Code(err) != tc.code {
			t.Errorf("%s: %v, want %v", tc.name, err, tc.code)
		}
	}

	// Before any sample: rated voltage, no coolant correction, the
	// default number of points.
	env, err := r.fleet.GetEnvelope(ctx, &pb.GetEnvelopeRequest{UnitId: "larchwater-2"})
	if err != nil {
		t.Fatal(err)
	}
	if env.UnitId != "larchwater-2" || env.VPu != 1 || env.Coolant != nil || len(env.Points) != rpc.DefaultEnvelopePoints {
		t.Fatalf("default envelope: unit %s, %g pu, coolant %v, %d points", env.UnitId, env.VPu, env.Coolant, len(env.Points))
	}
	// The armature limit is the circle P² + Q² = (V·I_rated)² (Kundur,
	// Power System Stability and Control, 1994, §5.4.1): at 1 pu, 120 MVA
	// for larchwater-2 (no coolant table). The points run from 0 MW to
	// the prime mover's 110 MW (below the 120 MW armature bound).
	for i, p := range env.Points {
		wantP := 110 * float64(i) / float64(len(env.Points)-1)
		if !closeTo(p.PMw, wantP, 1e-12) {
			t.Errorf("point %d at %g MW, want %g", i, p.PMw, wantP)
		}
		if p.QArmatureMvar == nil || !closeTo(*p.QArmatureMvar, math.Sqrt(120*120-p.PMw*p.PMw), 1e-9) {
			t.Errorf("point %d: armature arc %v Mvar at %g MW, want %g", i, p.QArmatureMvar, p.PMw, math.Sqrt(120*120-p.PMw*p.PMw))
		}
		if p.QMaxMvar != nil && p.QMinMvar != nil && *p.QMinMvar > *p.QMaxMvar {
			t.Errorf("point %d: q_min %g above q_max %g", i, *p.QMinMvar, *p.QMaxMvar)
		}
	}

	// After a sample the defaults are its voltage and coolant.
	if resp, err := r.tel.Push(ctx, &pb.PushRequest{Samples: []*pb.Sample{{UnitId: "harrowmere-1", Time: ts(time.Now()),
		PMw: 250, QMvar: 50, VKv: 21, Coolant: f64(310)}}}); err != nil || resp.Accepted != 1 {
		t.Fatalf("push: %v, %v", resp, err)
	}
	for _, tc := range []struct {
		name        string
		req         *pb.GetEnvelopeRequest
		vPU, cool   float64
		points      int
		armatureArc float64 // MVA: rated 390 × the coolant table's armature factor × v
	}{
		// At 310 kPa the example table's armature factor is 0.95.
		{"sample's voltage and coolant", &pb.GetEnvelopeRequest{UnitId: "harrowmere-1", Points: 5}, 21.0 / 20, 310, 5, 390 * 0.95 * 21 / 20},
		{"explicit kV and coolant", &pb.GetEnvelopeRequest{UnitId: "harrowmere-1", Voltage: &pb.GetEnvelopeRequest_VKv{VKv: 19}, Coolant: f64(414)}, 0.95, 414, rpc.DefaultEnvelopePoints, 390 * 1.0 * 0.95},
		{"explicit pu, one point asked", &pb.GetEnvelopeRequest{UnitId: "harrowmere-1", Voltage: &pb.GetEnvelopeRequest_VPu{VPu: 1}, Coolant: f64(200), Points: 1}, 1, 200, 2, 390 * 0.86},
	} {
		env, err := r.fleet.GetEnvelope(ctx, tc.req)
		if err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		if !closeTo(env.VPu, tc.vPU, 1e-12) || env.Coolant == nil || *env.Coolant != tc.cool || len(env.Points) != tc.points {
			t.Errorf("%s: %g pu, coolant %v, %d points; want %g pu, %g, %d points", tc.name, env.VPu, env.Coolant, len(env.Points), tc.vPU, tc.cool, tc.points)
			continue
		}
		p0 := env.Points[0]
		if p0.PMw != 0 || p0.QArmatureMvar == nil || !closeTo(*p0.QArmatureMvar, tc.armatureArc, 1e-9) {
			t.Errorf("%s: first point %g MW, armature arc %v Mvar, want 0 MW and %g Mvar", tc.name, p0.PMw, p0.QArmatureMvar, tc.armatureArc)
		}
		if !slices.IsSortedFunc(env.Points, func(a, b *pb.EnvelopePoint) int { return cmp.Compare(a.PMw, b.PMw) }) {
			t.Errorf("%s: points not ordered by p_mw", tc.name)
		}
	}
}
