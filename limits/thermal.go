package limits

import "math"

// Short-time thermal capability constants K, in seconds, of the law
// (x^2 - 1) t = K for a per-unit current x of the continuous rating
// (IEEE C50.13, from memory): armature 226 % for 10 s, 154 % 30 s,
// 130 % 60 s, 116 % 120 s; field 209 % for 10 s, 146 % 30 s, 125 % 60 s,
// 113 % 120 s.
const (
	ArmatureK = 41.4  // s
	FieldK    = 33.75 // s
)

// Thermal is the short-time thermal accumulator of one winding: the
// heating integral H = sum of (x^2 - 1) dt over the samples, floored at
// 0, so that below rating the winding cools at (1 - x^2) dt. H >= K is
// the limit. The zero value is a cold winding. Thermal is a plain value:
// copy it, store it, restore it.
type Thermal struct {
	H float64 // s
}

// Advance adds a hold of current x (pu of the continuous rating, at the
// present coolant) for dt seconds. A negative, NaN or infinite dt or a
// NaN x changes nothing.
func (t *Thermal) Advance(x, dt float64) {
	if !(dt > 0) || math.IsInf(dt, 1) || math.IsNaN(x) {
		return
	}
	t.H = math.Max(0, t.H+(x*x-1)*dt)
}

// Used returns H/K: 1 is the limit.
func (t Thermal) Used(k float64) float64 { return t.H / k }

// TimeLeft returns how long current x may still be held before H reaches
// K, (K - H)/(x^2 - 1), in seconds; ok is false when x <= 1 (no limit is
// approached). It is 0 once the limit is reached.
func (t Thermal) TimeLeft(x, k float64) (s float64, ok bool) {
	if !(x > 1) {
		return 0, false
	}
	return math.Max(0, (k-t.H)/(x*x-1)), true
}
