package limits

import (
	"math"
	"math/rand/v2"
	"testing"
)

// Benchmark units: plausible parameters of the demo kind, not check values.
func benchRound(tb testing.TB) *Unit {
	tb.Helper()
	u, err := New(Params{Rotor: Round, Xd: 2.1, Xq: 2.1, Xl: 0.16, Xp: 0.18, Ra: 0.002,
		XdTransient: 0.25, InertiaHS: 4.5, S10: 0.09, S12: 0.32, PowerFactor: 0.85,
		FrequencyHz: 50, PMax: 0.85, PMin: 0.24, Xe: 0.22, MarginFraction: 0.1,
		EndRegion: &EndRegion{P: []float64{0, 0.4, 0.85}, Q: []float64{-0.5, -0.4, -0.25}},
		Coolant:   &Coolant{At: []float64{200, 414}, Armature: []float64{0.86, 1}, Field: []float64{0.88, 1}}})
	if err != nil {
		tb.Fatal(err)
	}
	return u
}

func benchSalient(tb testing.TB) *Unit {
	tb.Helper()
	u, err := New(Params{Rotor: Salient, Xd: 1.05, Xq: 0.68, Xl: 0.15, Xp: 0.2, Ra: 0.003,
		XdTransient: 0.3, InertiaHS: 3.2, S10: 0.12, S12: 0.38, PowerFactor: 0.9,
		FrequencyHz: 50, PMax: 0.9, PMin: 0.1, Xe: 0.18, MarginFraction: 0.1})
	if err != nil {
		tb.Fatal(err)
	}
	return u
}

// spread returns n independent operating points over the whole chart.
func spread(u *Unit, n int) []Point {
	rng := rand.New(rand.NewPCG(1, 2))
	pts := make([]Point, n)
	for i := range pts {
		v := 0.92 + 0.16*rng.Float64()
		p := u.p.PMax * rng.Float64()
		q := -0.6 + 1.3*rng.Float64()
		pts[i] = Point{P: p, Q: q, V: v, F: 1, HasCoolant: true, Coolant: 200 + 250*rng.Float64()}
	}
	return pts
}

var sink Result

func benchmarkSpread(b *testing.B, u *Unit) {
	pts := spread(u, 4096)
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		sink = u.Evaluate(pts[i&4095], nil)
	}
}

func BenchmarkEvaluateRound(b *testing.B)   { benchmarkSpread(b, benchRound(b)) }
func BenchmarkEvaluateSalient(b *testing.B) { benchmarkSpread(b, benchSalient(b)) }

// tracking returns one unit's slowly moving telemetry: a load ramp with
// small reactive and voltage noise, one sample a second.
func tracking(n int) []Point {
	pts := walkIn(n, rand.New(rand.NewPCG(3, 4)), [3][3]float64{{0.5, 0.25, 0.84}, {0.1, -0.2, 0.4}, {1, 0.95, 1.05}})
	for i := range pts {
		pts[i].HasCoolant, pts[i].Coolant = true, 400
	}
	return pts
}

// walkIn is n points of a random walk of p, q and v (steps of 0.001,
// 0.002 and 0.0005 pu) from box[i][0], held to [box[i][1], box[i][2]].
func walkIn(n int, rng *rand.Rand, box [3][3]float64) []Point {
	pts := make([]Point, n)
	x := [3]float64{box[0][0], box[1][0], box[2][0]}
	step := [3]float64{0.001, 0.002, 0.0005}
	for i := range pts {
		for j := range x {
			x[j] = math.Min(box[j][2], math.Max(box[j][1], x[j]+step[j]*rng.NormFloat64()))
		}
		pts[i] = Point{P: x[0], Q: x[1], V: x[2], F: 1}
	}
	return pts
}

func benchmarkTracking(b *testing.B, u *Unit) {
	pts := tracking(4096)
	var h Hint
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		sink = u.Evaluate(pts[i&4095], &h)
	}
}

func BenchmarkEvaluateTracking(b *testing.B)        { benchmarkTracking(b, benchRound(b)) }
func BenchmarkEvaluateTrackingSalient(b *testing.B) { benchmarkTracking(b, benchSalient(b)) }

// BenchmarkEvaluateSample is the per-sample path of the service
// (EvaluateSample) on the tracking telemetry of both units.
func BenchmarkEvaluateSample(b *testing.B) {
	for _, tc := range []struct {
		name string
		u    *Unit
	}{{"round", benchRound(b)}, {"salient", benchSalient(b)}, {"avr", benchAVR(b)}} {
		b.Run(tc.name, func(b *testing.B) {
			pts := tracking(4096)
			var h Hint
			b.ReportAllocs()
			for i := range b.N {
				sink = tc.u.EvaluateSample(pts[i&4095], &h)
			}
		})
	}
}

// benchAVR is benchRound on the avr basis: a static exciter of moderate
// gain with a transducer and a speed stabilizer (plausible, not check values).
func benchAVR(tb testing.TB) *Unit {
	tb.Helper()
	p := benchRound(tb).Params()
	p.Basis, p.Td0TransientS, p.MarginFraction = BasisAVR, 7.5, 0
	p.Exciter = &Exciter{KA: 100, TAS: 0.02, TRS: 0.015}
	p.Stabilizer = &Stabilizer{K: 10, TWS: 3, T1S: 0.15, T2S: 0.03, T3S: 0.15, T4S: 0.03}
	u, err := New(p)
	if err != nil {
		tb.Fatal(err)
	}
	return u
}

func BenchmarkEvaluateTrackingAVR(b *testing.B) { benchmarkTracking(b, benchAVR(b)) }

// BenchmarkEvaluateTrackingAVRMargin is benchAVR with a practical margin
// of 0.1: the table's q_stability and the practical limit's scan.
func BenchmarkEvaluateTrackingAVRMargin(b *testing.B) {
	p := benchAVR(b).Params()
	p.MarginFraction = 0.1
	u, err := New(p)
	if err != nil {
		b.Fatal(err)
	}
	benchmarkTracking(b, u)
}

// BenchmarkNewAVR is the cost of preparing one avr unit (its table);
// a 10,000-unit fleet pays it 10,000 times at load.
func BenchmarkNewAVR(b *testing.B) {
	u := benchAVR(b)
	p := u.Params()
	b.ReportAllocs()
	for range b.N {
		if _, err := New(p); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(u.TableBytes()), "table-B")
}

// BenchmarkNewManual is New on the manual basis (no table), for
// comparison.
func BenchmarkNewManual(b *testing.B) {
	p := benchRound(b).Params()
	b.ReportAllocs()
	for range b.N {
		if _, err := New(p); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkNewAVRZetaMin is New with a damping-ratio criterion, whose
// table is built on eigenvalues.
func BenchmarkNewAVRZetaMin(b *testing.B) {
	p := benchAVR(b).Params()
	p.ZetaMin = 0.05
	b.ReportAllocs()
	for range b.N {
		if _, err := New(p); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkStabilityLimitAVR is the direct computation of q_stability
// on the avr basis (evaluate, envelope and coordinate use it).
func BenchmarkStabilityLimitAVR(b *testing.B) {
	u := benchAVR(b)
	b.ReportAllocs()
	for i := range b.N {
		_ = u.StabilityLimit(0.1+0.7*float64(i%8)/8, 1)
	}
}

// BenchmarkRotorMode is the rotor mode at one point, as a page or an RPC
// reads it (an eigen decomposition with both eigenvector sets).
func BenchmarkRotorMode(b *testing.B) {
	u := benchAVR(b)
	b.ReportAllocs()
	for i := range b.N {
		_, _, _ = u.RotorMode(Point{P: 0.1 + 0.7*float64(i%8)/8, Q: 0.1, V: 1})
	}
}

// benchAVRIsland is an avr unit whose stable set along q has a stable
// island below the limit over much of the chart, so that most cells of
// its table are marked scan (markScan): the salient unit of
// deploy/examples/fleet.yaml with the third exciter design of the load
// harness's fleet (test/load/fleetgen.go: a brushless rotating exciter,
// no negative field voltage). Invented data, not check values.
func benchAVRIsland(tb testing.TB) *Unit {
	tb.Helper()
	u, err := New(Params{Rotor: Salient, Xd: 1.05, Xq: 0.66, Xl: 0.15, Xp: 0.21, Ra: 0.003,
		XdTransient: 0.3, InertiaHS: 3.2, S10: 0.09, S12: 0.3, IfdRated: 1.9411764705882353, PowerFactor: 0.9,
		FrequencyHz: 50, PMax: 110.0 / 120, PMin: 20.0 / 120, Xe: 0.15, Basis: BasisAVR, Td0TransientS: 6.1,
		Exciter: &Exciter{KA: 50, TAS: 0.15, TRS: 0.02, EfdMin: 0, EfdMax: 4.5}})
	if err != nil {
		tb.Fatal(err)
	}
	return u
}

// islandTracking is tracking telemetry about p = 0.63, q = 0, v = 0.98 pu,
// inside a cell of benchAVRIsland's table marked scan.
func islandTracking(n int) []Point {
	return walkIn(n, rand.New(rand.NewPCG(5, 6)), [3][3]float64{{0.63, 0.605, 0.645}, {0, -0.2, 0.2}, {0.98, 0.965, 0.995}})
}

// BenchmarkEvaluateTrackingAVRIsland is the per-sample path (Evaluate
// with a Hint) in cells of the table marked scan (detectInterval).
func BenchmarkEvaluateTrackingAVRIsland(b *testing.B) {
	u := benchAVRIsland(b)
	pts := islandTracking(4096)
	for _, pt := range pts {
		t := u.avrTab
		if _, _, _, _, _, scan := t.at(pt.P/t.pStep, (pt.V-t.v0)*t.vInv); !scan {
			b.Fatalf("%+v: not in a scan cell", pt)
		}
	}
	var h Hint
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		sink = u.Evaluate(pts[i&4095], &h)
	}
}
