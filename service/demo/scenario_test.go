package demo

import (
	"context"
	"fmt"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/rpc"
)

func demoFleet(t testing.TB) *fleet.Fleet {
	t.Helper()
	fl, ds := fleet.Parse(FleetFileName, FleetYAML())
	if len(ds) > 0 {
		t.Fatalf("the demo fleet must have no errors and no warnings:\n%s", ds)
	}
	return fl
}

// The demo fleet is clean, has 6 to 10 units, round and salient rotors,
// a hydrogen-cooled unit and one rated against ambient temperature, and
// every unit's nameplate field current within 5 % of the model's.
func TestDemoFleet(t *testing.T) {
	fl := demoFleet(t)
	if n := len(fl.Units); n < 6 || n > 10 {
		t.Errorf("%d units, want 6 to 10", n)
	}
	var round, salient, h2, ambient int
	for _, u := range fl.Units {
		switch u.Machine.Rotor {
		case limits.Round:
			round++
		case limits.Salient:
			salient++
		}
		if u.Coolant != nil {
			switch u.Coolant.Quantity {
			case fleet.HydrogenPressureKPa:
				h2++
			case fleet.AmbientC:
				ambient++
			}
		}
		model := u.Base.FieldA(u.Model.ModelRatedFieldCurrent())
		if d := (u.Field.RatedA - model) / model; d < -0.05 || d > 0.05 {
			t.Errorf("%s: rated_a %.0f A is %+.1f %% from the model's %.0f A", u.ID, u.Field.RatedA, 100*d, model)
		}
	}
	if round == 0 || salient == 0 || h2 == 0 || ambient == 0 {
		t.Errorf("round %d, salient %d, hydrogen-cooled %d, ambient-rated %d; want each at least 1", round, salient, h2, ambient)
	}
}

// dayRun is one simulated day fed through the real telemetry handler
// into a store, on a simulated clock, one sample per unit per second.
type dayRun struct {
	// levels[unit][kind] is every level the alarm took, in order.
	levels map[string]map[alarm.Kind][]alarm.Level
	// maxThermal is the highest field thermal capability used per unit.
	maxFieldThermal map[string]float64
	endFieldThermal map[string]float64
	end             map[string][alarm.NumKinds]alarm.Machine
	rejected        int
	// While a unit's field-current mismatch alarm is active: samples
	// seen, and those whose field margin did not follow the model.
	mismatchSamples int
	mismatchWrong   []string
}

func runDay(t *testing.T, fl *fleet.Fleet, day time.Duration, extra time.Duration) *dayRun {
	t.Helper()
	sc, err := NewScenario(fl, day)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	now := t0
	clock := func() time.Time { return now }
	store := ingest.NewStore(fl, ingest.Options{Now: clock})
	tel := rpc.NewTelemetry(store, rpc.TelemetryOptions{Now: clock})
	r := &dayRun{levels: map[string]map[alarm.Kind][]alarm.Level{}, maxFieldThermal: map[string]float64{},
		endFieldThermal: map[string]float64{}, end: map[string][alarm.NumKinds]alarm.Machine{}}
	for _, u := range fl.Units {
		r.levels[u.ID] = map[alarm.Kind][]alarm.Level{}
	}
	steps := int((day + extra) / time.Second)
	for i := 0; i <= steps; i++ {
		now = t0.Add(time.Duration(i) * time.Second)
		resp, err := tel.Push(context.Background(), &pb.PushRequest{Sequence: uint64(i), Samples: sc.Samples(float64(i), now)})
		if err != nil {
			t.Fatal(err)
		}
		for _, rej := range resp.Rejected {
			r.rejected++
			if r.rejected < 5 {
				t.Errorf("t=%d s: sample %d rejected: %s %s", i, rej.Index, rej.Reason, rej.Detail)
			}
		}
		store.Sweep(now)
		for _, u := range store.Units() {
			v := u.View()
			id := v.Config.ID
			for k := range v.Alarms {
				l := v.Alarms[k].Level
				seq := r.levels[id][alarm.Kind(k)]
				if len(seq) == 0 && l != alarm.Normal || len(seq) > 0 && seq[len(seq)-1] != l {
					r.levels[id][alarm.Kind(k)] = append(seq, l)
				}
			}
			if v.HasSample && v.Alarms[alarm.FieldCurrentMismatch].Level != alarm.Normal {
				// The frozen reading is doubted: the field margin is the
				// smaller of the model's (a cold evaluation without the
				// reading) and the reading's, 1 - i_fd/i_fd_max (envelope.md,
				// "Margins": the larger of the two field currents).
				r.mismatchSamples++
				pt := v.Point
				pt.IfdMeasured = false
				model := v.Config.Model.Evaluate(pt, nil)
				want := model.Margins[limits.LimitField]
				if v.Point.IfdMeasured {
					want.V = math.Min(want.V, 1-v.Point.Ifd/model.IfdMax)
				}
				got := v.Eval.Margins[limits.LimitField]
				if !v.Point.IfdDoubtful || got.OK != want.OK || math.Abs(got.V-want.V) > 1e-6 {
					r.mismatchWrong = append(r.mismatchWrong, fmt.Sprintf("%s t=%d s: field margin %v, want %v, reading doubted %v", id, i, got, want, v.Point.IfdDoubtful))
				}
			}
			ft := v.Field.Used(limits.FieldK)
			r.maxFieldThermal[id] = max(r.maxFieldThermal[id], ft)
			r.endFieldThermal[id] = ft
			r.end[id] = v.Alarms
		}
	}
	return r
}

func (r *dayRun) reached(unit string, k alarm.Kind) alarm.Level {
	return slices.Max(append([]alarm.Level{alarm.Normal}, r.levels[unit][k]...))
}

// One whole simulated day at speed 1, for the shortest, the default and
// a longer day: every episode raises the alarms it is meant to, they all
// return to normal, and nothing else alarms.
func TestScenarioDay(t *testing.T) {
	for _, day := range []time.Duration{MinDay, DefaultDay, time.Hour} {
		t.Run(day.String(), func(t *testing.T) { testScenarioDay(t, day) })
	}
}

func testScenarioDay(t *testing.T, day time.Duration) {
	fl := demoFleet(t)
	r := runDay(t, fl, day, 0)

	want := map[string]map[alarm.Kind]alarm.Level{ // the least level each episode must reach
		"vessa-2":      {},
		"ashgrove-1":   {alarm.Field: alarm.Critical, alarm.FieldThermal: alarm.Warning},
		"tillmoor-st1": {alarm.FieldCurrentMismatch: alarm.Critical},
		"quarrendon-1": {alarm.StaleTelemetry: alarm.Critical},
	}
	allowed := map[string][]alarm.Kind{}
	for _, e := range Episodes(day) {
		for _, u := range fl.Units {
			if e.Unit == u.ID || e.Site != "" && e.Site == u.Site {
				for _, a := range e.Alarms {
					k, ok := alarm.ParseKind(a)
					if !ok {
						t.Fatalf("episode %s: unknown alarm %q", e.Name, a)
					}
					allowed[u.ID] = append(allowed[u.ID], k)
				}
			}
		}
	}
	for id, ks := range want {
		for k, l := range ks {
			if got := r.reached(id, k); got < l {
				t.Errorf("%s %s reached %s, want at least %s", id, k, got, l)
			}
		}
	}
	if got := max(r.reached("vessa-2", alarm.Stability), r.reached("vessa-2", alarm.EndRegion)); got != alarm.Critical {
		t.Errorf("vessa-2: the underexcited drift reached %s, want critical (stability %v, end region %v)",
			got, r.levels["vessa-2"][alarm.Stability], r.levels["vessa-2"][alarm.EndRegion])
	}
	if got := r.reached("vessa-1", alarm.VoltsPerHertz); got < alarm.Warning {
		t.Errorf("vessa-1: volts per hertz reached %s in the high-voltage episode, want warning", got)
	}
	for _, id := range []string{"tillmoor-gt1", "tillmoor-st1"} {
		if got := r.reached(id, alarm.VoltageFrequencyZone); got < alarm.Warning {
			t.Errorf("%s: zone reached %s in the low-voltage episode, want warning", id, got)
		}
	}
	if m := r.maxFieldThermal["ashgrove-1"]; m < 0.4 {
		t.Errorf("ashgrove-1: field thermal capability used peaked at %.2f, want above the 0.4 warning", m)
	}
	if e := r.endFieldThermal["ashgrove-1"]; e > 0.01 {
		t.Errorf("ashgrove-1: field thermal capability used %.2f at the end of the day, want it back to 0", e)
	}
	var unexpected []string
	for _, u := range fl.Units {
		for k, seq := range r.levels[u.ID] {
			if len(seq) > 0 && !slices.Contains(allowed[u.ID], k) {
				unexpected = append(unexpected, fmt.Sprintf("%s %s %v", u.ID, k, seq))
			}
		}
		for k, m := range r.end[u.ID] {
			if m.Level != alarm.Normal {
				t.Errorf("%s %s is %s at the end of the day, want normal", u.ID, alarm.Kind(k), m.Level)
			}
		}
	}
	slices.Sort(unexpected)
	if len(unexpected) > 0 {
		t.Errorf("alarms no episode is meant to raise:\n%s", strings.Join(unexpected, "\n"))
	}
	if r.rejected > 0 {
		t.Errorf("%d samples rejected", r.rejected)
	}
	// The frozen-sensor episode: while the mismatch alarm is active the
	// field margin follows the model, not the frozen reading.
	if r.mismatchSamples == 0 {
		t.Error("no sample while the field-current mismatch alarm was active")
	}
	if n := len(r.mismatchWrong); n > 0 {
		t.Errorf("%d samples with the mismatch alarm active trusted the reading alone, e.g.\n%s", n, strings.Join(r.mismatchWrong[:min(n, 5)], "\n"))
	}
}
