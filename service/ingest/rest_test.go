package ingest

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

// TestRestSkipsOnlyQuietSteps runs the same random sample streams
// through two stores: one as the service runs (alarms at rest skipped
// through Unit.rest), and a reference whose cache is emptied before
// every sample, so that every alarm of every sample goes through
// Machine.Step. The streams wander over and past the limits (P, Q, V,
// frequency, a field current near and far from the model, QUESTIONABLE
// samples, gaps beyond the hold time), with wall-clock sweeps, reloads
// that change thresholds and disable alarms, acknowledgements and
// shelves, restarts from a state file. After every step the alarm machines of every unit (level,
// delay timers, since, value, acknowledgement, shelf) and the
// transition counts must be equal.
func TestRestSkipsOnlyQuietSteps(t *testing.T) {
	seeds := 8
	steps := 1500
	if testing.Short() {
		seeds, steps = 2, 600
	}
	for seed := range uint64(seeds) {
		r := rand.New(rand.NewPCG(seed, 13))
		base := exampleFleet(t)
		fast := NewStore(base, Options{})
		ref := NewStore(base, Options{})
		ids := []string{"harrowmere-1", "larchwater-2", "brindle-gt3"}
		type walk struct{ p, q, v, f, ifd float64 }
		w := make([]walk, len(ids))
		for i := range w {
			w[i] = walk{p: 0.6, q: 0.1, v: 1, f: 1, ifd: 1}
		}
		tNS := t0.UnixNano()
		var saved *Snapshot
		for step := range steps {
			i := r.IntN(len(ids))
			cfg := fast.Fleet().Units[i]
			wk := &w[i]
			// A random walk with jumps, clamped to where samples are
			// plausible but limits are crossed.
			move := func(x *float64, sd, lo, hi float64) {
				*x += sd * r.NormFloat64()
				if r.IntN(50) == 0 {
					*x = lo + (hi-lo)*r.Float64()
				}
				*x = min(hi, max(lo, *x))
			}
			move(&wk.p, 0.03, -0.05, 1.15)
			move(&wk.q, 0.04, -0.8, 0.9)
			move(&wk.v, 0.01, 0.9, 1.14)
			move(&wk.f, 0.005, 0.94, 1.06)
			move(&wk.ifd, 0.05, 0.5, 1.6)
			rt := cfg.Rating
			smp := Sample{UnitID: ids[i], PMW: wk.p * rt.MVA, QMvar: wk.q * rt.MVA, VKV: wk.v * rt.KV}
			if r.IntN(3) > 0 {
				smp.FrequencyHz, smp.HasFreq = wk.f*rt.FrequencyHz, true
			}
			if r.IntN(2) == 0 {
				smp.FieldA, smp.HasFieldA = wk.ifd*cfg.Field.RatedA*0.7, true
			}
			if r.IntN(20) == 0 {
				smp.Quality = QualityQuestionable
			}
			dt := time.Duration(200+r.IntN(1500)) * time.Millisecond
			if r.IntN(40) == 0 {
				dt = time.Duration(5+r.IntN(60)) * time.Second // a gap, and time for delays to run out
			}
			tNS += int64(dt)
			smp.Time = time.Unix(0, tNS)
			now := smp.Time.Add(time.Duration(r.IntN(500)) * time.Millisecond)

			ref.Unit(ids[i]).forgetRest()
			a1, d1 := fast.Accept(now, &smp)
			a2, d2 := ref.Accept(now, &smp)
			if a1 != a2 || d1 != d2 {
				t.Fatalf("seed %d step %d: %v %q against %v %q", seed, step, a1, d1, a2, d2)
			}
			switch r.IntN(100) {
			case 0, 1, 2: // the wall clock moves on while the unit is silent
				later := now.Add(time.Duration(1+r.IntN(40)) * time.Second)
				fast.Sweep(later)
				ref.Sweep(later)
			case 3: // a reload with other thresholds, some alarms off
				k := alarm.Kind(r.IntN(int(alarm.NumKinds)))
				warn := r.NormFloat64() * 0.1
				off := r.IntN(3) == 0
				for _, s := range []*Store{fast, ref} {
					// The same units (models) with other settings.
					fl := base.Subset(func(*fleet.Unit) bool { return true })
					for j, u := range fl.Units {
						c := *u
						fl.Units[j] = &c
						set := &c.Alarms[k]
						set.Disabled = off
						if !alarm.Rising(k) {
							set.Warning = max(set.Critical, set.Warning+warn)
						} else {
							set.Warning = min(set.Critical, set.Warning+warn)
						}
					}
					s.Replace(fl)
				}
			case 5: // a restart from an older state file
				if saved != nil {
					fast.Restore(saved)
					ref.Restore(saved)
				}
				saved = ref.Snapshot(now)
			case 4: // an operator acknowledges and shelves
				k := alarm.Kind(r.IntN(int(alarm.NumKinds)))
				e1 := fast.Acknowledge(ids[i], k, now, "op")
				e2 := ref.Acknowledge(ids[i], k, now, "op")
				if (e1 == nil) != (e2 == nil) {
					t.Fatalf("seed %d step %d: acknowledge %v against %v", seed, step, e1, e2)
				}
				_ = fast.Shelve(ids[i], k, now.Add(20*time.Second), now, "op")
				_ = ref.Shelve(ids[i], k, now.Add(20*time.Second), now, "op")
			}
			compareAlarms(t, seed, step, fast, ref, ids)
		}
		if fast.Transitions() != ref.Transitions() {
			t.Fatalf("seed %d: transitions %v against %v", seed, fast.Transitions(), ref.Transitions())
		}
		if seed == 0 {
			var n uint64
			for _, byLevel := range fast.Transitions() {
				n += byLevel[0] + byLevel[1] + byLevel[2]
			}
			if n < 20 {
				t.Fatalf("only %d transitions: the streams do not reach the limits", n)
			}
			t.Logf("seed 0: %d transitions", n)
		}
	}
}

func compareAlarms(t *testing.T, seed uint64, step int, a, b *Store, ids []string) {
	t.Helper()
	for _, id := range ids {
		ua, ub := a.Unit(id), b.Unit(id)
		ua.mu.Lock()
		aa := ua.alarms
		ua.mu.Unlock()
		ub.mu.Lock()
		ab := ub.alarms
		ub.mu.Unlock()
		for k := range aa {
			ma, mb := aa[k], ab[k]
			same := ma == mb || math.IsNaN(ma.Value) && math.IsNaN(mb.Value) && func() bool {
				ma.Value, mb.Value = 0, 0
				return ma == mb
			}()
			if !same {
				t.Fatalf("seed %d step %d: %s %s: with the cache %+v, stepped %+v", seed, step, id, alarm.Kind(k), ma, mb)
			}
		}
	}
}

// forgetRest empties the unit's cache of alarms at rest.
func (u *Unit) forgetRest() {
	u.mu.Lock()
	u.rest.forget()
	u.mu.Unlock()
}
