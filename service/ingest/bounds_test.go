package ingest

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestSampleBoundsAgreeWithCheckValues: the per-sample shortcut
// (sampleBounds.within) accepts exactly the samples checkValues accepts,
// on random samples of every example unit spread around each bound,
// exactly on them, and with NaN and infinities.
func TestSampleBoundsAgreeWithCheckValues(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	r := rand.New(rand.NewPCG(2, 13))
	odd := []float64{math.NaN(), math.Inf(1), math.Inf(-1), 0, -1e-300}
	for _, e := range s.snap.Load().byID {
		b := e.lim
		// Values on, near and around every bound the checks use.
		pick := func(edges ...float64) float64 {
			switch k := r.IntN(10); {
			case k == 0:
				return odd[r.IntN(len(odd))]
			case k < 4:
				return edges[r.IntN(len(edges))] // exactly on one
			default:
				x := edges[r.IntN(len(edges))]
				return x * (1 + 0.05*r.NormFloat64())
			}
		}
		accepted := 0
		for range 20000 {
			smp := Sample{UnitID: e.cfg.ID,
				// The last: the armature current at its bound at the lowest voltage.
				PMW:   pick(b.sMax, -b.sMax, 0.5*b.sMax, b.mva, b.currentMax*b.mva*(b.vLo/b.kv)),
				QMvar: pick(b.sMax, -b.sMax, 0.3*b.sMax, -0.3*b.mva),
				VKV:   pick(b.vLo, b.vHi, b.kv, b.kv/b.currentMax)}
			if r.IntN(2) == 0 {
				smp.FieldA, smp.HasFieldA = pick(b.fieldMax, 0, 0.5*b.fieldMax), true
			}
			if r.IntN(2) == 0 {
				smp.FrequencyHz, smp.HasFreq = pick(b.fLo, b.fHi, (b.fLo+b.fHi)/2), true
			}
			if r.IntN(2) == 0 {
				smp.Coolant, smp.HasCoolant = pick(20, 300), true
			}
			want, detail := checkValues(e.cfg, e.plaus, &smp)
			if got := b.within(&smp); got != (want == Accepted) {
				t.Fatalf("%s %+v: within %v, checkValues %v (%s)", e.cfg.ID, smp, got, want, detail)
			}
			if want == Accepted {
				accepted++
			}
		}
		if accepted < 1000 || accepted > 19000 {
			t.Errorf("%s: %d of 20000 accepted: the samples do not straddle the bounds", e.cfg.ID, accepted)
		}
	}
}
