package fleet

import (
	"fmt"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/limits"
)

// The regulator's limiters of the excitation: block: oel, scl and
// vhz_limiter (coordination.md). The excitation decoder hands them over
// to decodeLimiters.

// Limiters are the regulator's limiter settings, as in the file.
type Limiters struct {
	OEL        *InverseTime // overexcitation limiter, pu of rated field current; nil when not given
	SCL        *InverseTime // stator current limiter, pu of rated armature current; nil when not given
	VHzLimiter *VHzLimiter  // nil when not given
}

// InverseTime is an inverse-time characteristic: pickup, ceiling and k_s
// (t = k_s / ((x/pickup)^2 - 1)), or points of (current, time).
type InverseTime struct {
	PickupPU  float64 // 0 with points
	CeilingPU float64 // 0 when not given
	KS        float64 // s; 0 with points
	Points    []TimePoint
}

// TimePoint is one point of an inverse-time curve.
type TimePoint struct {
	XPU, TimeS float64
	Line       int
}

// VHzLimiter is the regulator's volts-per-hertz limiter.
type VHzLimiter struct {
	SetpointPU float64 // pu of rated V/Hz on the generator base
}

// decodeLimiters decodes the oel, scl and vhz_limiter keys of the
// excitation mapping m at path.
func (c *unitCtx) decodeLimiters(m *mapping, path string) {
	l := &c.u.Limiters
	if v, line, ok := m.get("oel"); ok {
		l.OEL = c.decodeInverseTime(v, join(path, "oel"), line, true, "field_pu", "field current in pu of the rated field current")
	}
	if v, line, ok := m.get("scl"); ok {
		l.SCL = c.decodeInverseTime(v, join(path, "scl"), line, true, "current_pu", "stator current in pu of the rated current")
	}
	if v, line, ok := m.get("vhz_limiter"); ok {
		p := join(path, "vhz_limiter")
		if vm, ok := c.open(v, p, line, "setpoint_pu"); ok {
			if x, ok := c.number(vm, "setpoint_pu", true, "the limiter's setpoint in pu of rated V/Hz on the generator base", between(1, 1.3, true, false)); ok {
				l.VHzLimiter = &VHzLimiter{SetpointPU: x}
			}
		}
	}
}

// decodeInverseTime decodes an inverse-time characteristic at path:
// {pickup_pu, ceiling_pu, k_s} or {points: [{xKey, time_s}, ...],
// ceiling_pu}. withCeiling allows ceiling_pu.
func (c *unitCtx) decodeInverseTime(v *yaml.Node, path string, line int, withCeiling bool, xKey, xWhat string) *InverseTime {
	keys := []string{"pickup_pu", "k_s", "points"}
	if withCeiling {
		keys = append(keys, "ceiling_pu")
	}
	m, ok := c.open(v, path, line, keys...)
	if !ok {
		return nil
	}
	it := &InverseTime{}
	hasPoints := m.has("points")
	hasPickup := m.has("pickup_pu")
	hasK := m.has("k_s")
	if hasPoints && (hasPickup || hasK) {
		c.errorf(line, path, "give either pickup_pu and k_s, or points; not both")
		return nil
	}
	good := true
	if withCeiling {
		if x, ok := c.number(m, "ceiling_pu", false, "the current in pu at and above which it acts at once", between(1, 10, true, false)); ok {
			it.CeilingPU = x
		} else if present := m.has("ceiling_pu"); present {
			good = false
		}
	}
	if hasPoints {
		items, pl, ok := c.list(m, "points", true, "at least two points {"+xKey+", time_s} with increasing "+xKey+" and falling time")
		if !ok {
			return nil
		}
		field := join(path, "points")
		for i, item := range items {
			pm, _, ok := c.openItem(item, field, i, xKey, "time_s")
			if !ok {
				good = false
				continue
			}
			x, okX := c.number(pm, xKey, true, "the "+xWhat, between(0.5, 10, false, false))
			t, okT := c.number(pm, "time_s", true, "the operating time in s at that current", positive)
			if !okX || !okT {
				good = false
				continue
			}
			it.Points = append(it.Points, TimePoint{XPU: x, TimeS: t, Line: item.Line})
		}
		if !good {
			return nil
		}
		if len(it.Points) < 2 {
			c.errorf(pl, field, "has %d point(s); give at least two", len(it.Points))
			return nil
		}
		for i := 1; i < len(it.Points); i++ {
			a, b := it.Points[i-1], it.Points[i]
			if b.XPU <= a.XPU {
				c.errorf(b.Line, field, "point %d: %s %s is not above %s of point %d; the current must be strictly increasing", i+1, xKey, fmtNum(b.XPU), fmtNum(a.XPU), i)
				return nil
			}
			if b.TimeS > a.TimeS {
				c.errorf(b.Line, field, "point %d: time_s %s is above %s of point %d; an inverse-time curve's time must not rise with current", i+1, fmtNum(b.TimeS), fmtNum(a.TimeS), i)
				return nil
			}
		}
		if it.CeilingPU > 0 && it.CeilingPU <= it.Points[0].XPU {
			c.errorf(c.u.Line(join(path, "ceiling_pu")), join(path, "ceiling_pu"), "ceiling %s pu is not above the first point's %s pu; the ceiling must lie above where the curve starts",
				fmtNum(it.CeilingPU), fmtNum(it.Points[0].XPU))
			return nil
		}
		return it
	}
	pick, okP := c.number(m, "pickup_pu", true, "the pickup in pu of the rating, above which it times", between(0.5, 3, false, false))
	k, okK := c.number(m, "k_s", true, "the time constant k_s in s of t = k_s / ((x/pickup)^2 - 1)", positive)
	if !okP || !okK || !good {
		return nil
	}
	it.PickupPU, it.KS = pick, k
	if it.CeilingPU > 0 && it.CeilingPU <= pick {
		c.errorf(c.u.Line(join(path, "ceiling_pu")), join(path, "ceiling_pu"), "ceiling %s pu is not above the pickup %s pu; the ceiling must lie above the pickup",
			fmtNum(it.CeilingPU), fmtNum(pick))
		return nil
	}
	return it
}

// Curve returns the characteristic in the engine's form.
func (it *InverseTime) Curve() *limits.InverseTime {
	if it == nil {
		return nil
	}
	c := &limits.InverseTime{Pickup: it.PickupPU, Ceiling: it.CeilingPU, K: it.KS}
	for _, p := range it.Points {
		c.X = append(c.X, p.XPU)
		c.T = append(c.T, p.TimeS)
	}
	return c
}

// between returns a rule allowing x in the interval from lo to hi, open
// or closed at each end.
func between(lo, hi float64, loOpen, hiOpen bool) func(float64) string {
	return func(x float64) string {
		okLo := x > lo || (!loOpen && x == lo)
		okHi := x < hi || (!hiOpen && x == hi)
		if okLo && okHi {
			return ""
		}
		l, r := "[", "]"
		if loOpen {
			l = "("
		}
		if hiOpen {
			r = ")"
		}
		return fmt.Sprintf("must be in %s%s, %s%s", l, fmtNum(lo), fmtNum(hi), r)
	}
}
