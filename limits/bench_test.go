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
	rng := rand.New(rand.NewPCG(3, 4))
	pts := make([]Point, n)
	p, q, v := 0.5, 0.1, 1.0
	for i := range pts {
		p = math.Min(0.84, math.Max(0.25, p+0.001*rng.NormFloat64()))
		q = math.Min(0.4, math.Max(-0.2, q+0.002*rng.NormFloat64()))
		v = math.Min(1.05, math.Max(0.95, v+0.0005*rng.NormFloat64()))
		pts[i] = Point{P: p, Q: q, V: v, F: 1, HasCoolant: true, Coolant: 400}
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
