package limits

import (
	"fmt"
	"math"
	"slices"
)

// This file holds the regulator's limiters and the generator protection
// that act at the edge of the envelope (coordination.md): their curves in
// per unit, the geometry that maps impedance relays onto the P-Q plane, and
// the live limiter timers. The coordination checks are in coordination.go.

// InverseTime is an inverse-time characteristic: an overexcitation
// limiter (OEL), a stator current limiter (SCL) or a field overcurrent
// relay. x is the current in pu of the winding's continuous rating (rated
// field current for the OEL and the field relay, rated armature current
// for the SCL).
//
// Formula form (K > 0): t(x) = K / ((x/pickup)^2 - 1) for x > pickup,
// no action at or below the pickup (coordination.md, "Curves").
//
// Points form (len(X) > 0): log-linear interpolation, ln t linear in x
// between the points, held at the last point's time above it. The first
// point is the pickup: below it the curve does not act (a limiter that
// acted at any current would be a setting error, not a curve).
//
// Ceiling (> 0): at or above it the characteristic acts at once (t = 0),
// as an OEL's instantaneous limit does; 0 means none.
type InverseTime struct {
	Pickup  float64   // pu; the formula's pickup, or X[0] in the points form
	Ceiling float64   // pu; 0 when none
	K       float64   // s; the formula's constant (k_s)
	X, T    []float64 // the points form: strictly increasing x (pu), positive t (s)
}

// Check returns an error naming what is wrong with c, or nil. field is the
// fleet-file path of c, for the message.
func (c *InverseTime) Check(field string) error {
	bad := func(sub, format string, args ...any) error {
		return &ParamError{Field: field + sub, Reason: fmt.Sprintf(format, args...)}
	}
	if !(c.Ceiling >= 0) || math.IsInf(c.Ceiling, 0) {
		return bad(".ceiling_pu", "must be a positive current in pu when given, got %v", c.Ceiling)
	}
	if len(c.X) > 0 {
		if len(c.X) < 2 || len(c.X) != len(c.T) {
			return bad(".points", "need at least two points, each with field_pu and time_s; got %d", len(c.X))
		}
		for i := range c.X {
			if !(c.X[i] > 0) || !(c.T[i] > 0) || math.IsInf(c.X[i], 0) || math.IsInf(c.T[i], 0) {
				return bad(".points", "point %d: current and time must be positive and finite", i+1)
			}
			if i > 0 && c.X[i] <= c.X[i-1] {
				return bad(".points", "the current must be strictly increasing; point %d is not above point %d", i+1, i)
			}
			if i > 0 && c.T[i] > c.T[i-1] {
				return bad(".points", "an inverse-time curve's time must not rise with current; point %d has %v s after %v s", i+1, c.T[i], c.T[i-1])
			}
		}
		if c.Ceiling > 0 && c.Ceiling <= c.X[0] {
			return bad(".ceiling_pu", "ceiling %v pu is not above the first point's %v pu", c.Ceiling, c.X[0])
		}
		return nil
	}
	if !(c.Pickup > 0) || math.IsInf(c.Pickup, 0) {
		return bad(".pickup_pu", "must be a positive current in pu, got %v", c.Pickup)
	}
	if !(c.K > 0) || math.IsInf(c.K, 0) {
		return bad(".k_s", "must be a positive time in s, got %v", c.K)
	}
	if c.Ceiling > 0 && c.Ceiling <= c.Pickup {
		return bad(".ceiling_pu", "ceiling %v pu is not above the pickup %v pu", c.Ceiling, c.Pickup)
	}
	return nil
}

// PickupPU returns the current above which the characteristic acts, pu.
func (c *InverseTime) PickupPU() float64 {
	if len(c.X) > 0 {
		return c.X[0]
	}
	return c.Pickup
}

// Time returns the operating time at a constant current x (pu), in s:
// +Inf at or below the pickup, 0 at or above the ceiling.
//
//	formula: t(x) = K / ((x/pickup)^2 - 1)          (coordination.md)
//	points:  ln t = ln t_i + (x - x_i)/(x_i+1 - x_i) (ln t_i+1 - ln t_i)
func (c *InverseTime) Time(x float64) float64 {
	if c.Ceiling > 0 && x >= c.Ceiling {
		return 0
	}
	if n := len(c.X); n > 0 {
		switch {
		case !(x > c.X[0]):
			return math.Inf(1)
		case x >= c.X[n-1]:
			return c.T[n-1]
		}
		i, _ := slices.BinarySearch(c.X, x)
		i-- // x lies in (X[i], X[i+1]]
		w := (x - c.X[i]) / (c.X[i+1] - c.X[i])
		return math.Exp(math.Log(c.T[i]) + w*(math.Log(c.T[i+1])-math.Log(c.T[i])))
	}
	r := x / c.Pickup
	if !(r > 1) {
		return math.Inf(1)
	}
	return c.K / (r*r - 1)
}

// CapabilityTime is the IEEE C50.13 (from memory) short-time capability of
// a winding: the time a current x (pu of the continuous rating) may be
// held from rated temperature, t = K / (x^2 - 1), with K = FieldK or
// ArmatureK; +Inf at or below 1 pu.
func CapabilityTime(k, x float64) float64 {
	if !(x > 1) {
		return math.Inf(1)
	}
	return k / (x*x - 1)
}

// MhoZone is one zone of an offset mho loss-of-field relay (device 40):
// the circle in the R-X plane through -j Offset and -j (Offset + Diameter),
// impedances in pu on the machine base (coordination.md).
type MhoZone struct {
	Offset, Diameter float64 // pu
	DelayS           float64 // s
}

// LossOfField is a loss-of-field relay. SecondaryPerPU converts an
// impedance in pu on the machine base to secondary ohms at the relay,
// Z_base ct_ratio / vt_ratio (0 when the ratios are not known);
// PrimaryPerPU is Z_base = kV^2 / MVA, ohms.
type LossOfField struct {
	Zones          []MhoZone
	SecondaryPerPU float64
	PrimaryPerPU   float64
}

// VHzStage is one definite-time stage of a volts-per-hertz relay (device
// 24): pickup in pu of rated V/Hz on the generator base.
type VHzStage struct {
	Pickup, DelayS float64
}

// Transformer is the step-up transformer, as the V/Hz study needs it.
type Transformer struct {
	MVA        float64 // rated MVA
	LVRatio    float64 // rated voltage of the generator-side winding over the generator's rated voltage
	XOwnBasePU float64 // leakage reactance on its own base, pu
}

// Settings are the limiter and protection settings of one unit, in pu on
// the machine base; each nil (or 0) when not given.
type Settings struct {
	OEL, SCL         *InverseTime
	VHzLimiter       float64 // setpoint, pu V/Hz on generator base; 0 when none
	LossOfField      *LossOfField
	FieldOvercurrent *InverseTime
	VHzRelay         []VHzStage
	Transformer      *Transformer
}

// ImpedanceBaseOhm returns Z_base = kV^2 / MVA in ohms, the impedance of
// 1 pu on a base of kv (line-line) and mva.
func ImpedanceBaseOhm(kv, mva float64) float64 { return kv * kv / mva }

// ApparentImpedance returns the impedance seen from the terminals at an
// operating point, Z = v^2 / (p - j q) (pu; coordination.md):
// R = v^2 p / (p^2 + q^2), X = v^2 q / (p^2 + q^2). ok is false at
// p = q = 0, where Z is infinite.
func ApparentImpedance(p, q, v float64) (r, x float64, ok bool) {
	s2 := p*p + q*q
	if s2 == 0 {
		return 0, 0, false
	}
	return v * v * p / s2, v * v * q / s2, true
}

// MhoPQ returns the image in the P-Q plane, at terminal voltage v, of the
// mho circle through -j a and -j (a + d) in the R-X plane (pu): a circle
// with centre (0, cq) and radius r,
//
//	cq = -v^2 (a + d/2) / (a (a + d)),  r = v^2 (d/2) / (a (a + d)).
//
// Source: the image of a circle not through the origin under
// S = v^2 / Z* (coordination.md; the two points -j a and -j (a + d) map
// to -j v^2/a and -j v^2/(a + d), the ends of the image's diameter on the
// Q axis). It needs a > 0 and d > 0.
func MhoPQ(a, d, v float64) (cq, r float64) {
	k := v * v / (a * (a + d))
	return -k * (a + d/2), k * d / 2
}

// ZoneTop returns the highest reactive power of zone z's P-Q image at
// active power p and voltage v (pu): absent where the line p does not
// cross the image.
func ZoneTop(z MhoZone, p, v float64) Bound {
	cq, r := MhoPQ(z.Offset, z.Diameter, v)
	d := r*r - p*p
	if d < 0 {
		return Bound{}
	}
	return some(cq + math.Sqrt(d))
}

// ManualStabilityRX returns the manual (constant field voltage)
// steady-state stability limit of a round rotor in the R-X plane: the
// circle whose diameter runs from -j xd to +j xe, centre (0, cx) and
// radius r (pu). Source: textbook; IEEE C37.102 (from memory).
func ManualStabilityRX(xd, xe float64) (cx, r float64) {
	return (xe - xd) / 2, (xe + xd) / 2
}

// TransformerVHzCapability returns a step-up transformer's V/Hz
// capability on the generator base (IEEE C57.12.00, from memory): 1.05 pu
// of its rated voltage at rated load and 1.10 pu at no load, times
// kv_lv / generator rated kV.
func TransformerVHzCapability(lvRatio float64) (ratedLoad, noLoad float64) {
	return 1.05 * lvRatio, 1.10 * lvRatio
}

// GeneratorVHzContinuous is the generator's continuous V/Hz capability on
// its own base, 1.05 pu (IEEE C37.102 / C50.13, from memory).
const GeneratorVHzContinuous = 1.05

// LimiterTimer is the live state of an inverse-time limiter (OEL or SCL),
// advanced on the samples' own timestamps like the thermal accumulator
// (coordination.md, "Live"): while the current is above the pickup,
// Used += dt / t(x); at or below the pickup it resets to 0. Used >= 1 is
// the limiter acting. The zero value is a limiter at rest; it is a plain
// value to copy, store and restore.
type LimiterTimer struct {
	Used float64 // fraction of the inverse-time delay used, 0 to 1
}

// Advance holds current x (pu) for dt seconds against characteristic c.
// A negative, NaN or infinite dt or a NaN x changes nothing.
func (t *LimiterTimer) Advance(c *InverseTime, x, dt float64) {
	if c == nil || !(dt > 0) || math.IsInf(dt, 1) || math.IsNaN(x) {
		return
	}
	if !(x > c.PickupPU()) {
		t.Used = 0
		return
	}
	tx := c.Time(x)
	if tx <= 0 {
		t.Used = 1
		return
	}
	t.Used = math.Min(1, t.Used+dt/tx)
}

// TimeToAction returns how long current x (pu) may still be held before
// the limiter acts, (1 - Used) t(x), in s; ok is false when x is at or
// below the pickup (the limiter is not timing).
func (t LimiterTimer) TimeToAction(c *InverseTime, x float64) (s float64, ok bool) {
	if c == nil || !(x > c.PickupPU()) {
		return 0, false
	}
	return math.Max(0, (1-t.Used)*c.Time(x)), true
}

// VHzLimiterMargin returns the V/Hz limiter's margin, 1 - (v/f)/setpoint
// (coordination.md, "Live"): v and f in pu of rated (f = 0 means rated).
func VHzLimiterMargin(v, f, setpoint float64) float64 {
	if f == 0 {
		f = 1
	}
	return 1 - (v/f)/setpoint
}
