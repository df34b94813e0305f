package ingest

import (
	"math"
	"time"
)

// The trend of each unit: its reactive headroom and its nearest margin
// over the last hours, for the unit page. It is a fixed ring inside the
// unit, written on the accept path without allocating; Prometheus keeps
// the long history.
const (
	// TrendStep is the sample time one trend point covers.
	TrendStep = time.Minute
	// TrendPoints is how many points the ring keeps: six hours.
	TrendPoints = 360
)

// Quantisation of the stored values: headroom in 1/1000 of rated MVA
// (±32.7 pu), the margin in 1/10000 (±3.27); trendMissing marks a step
// without a sample.
const (
	trendHeadroomScale = 1000
	trendMarginScale   = 10000
	trendMissing       = math.MinInt16
)

// trendSlot is one step of the ring: 6 bytes, so that 10,000 units keep
// six hours in about 21 MB.
type trendSlot struct{ up, down, margin int16 }

// trend is a unit's ring. Slot s (sample time / TrendStep) lives at
// index s mod TrendPoints; the ring holds slots first..last, at most
// TrendPoints of them.
type trend struct {
	has         bool
	first, last int64
	slots       *[TrendPoints]trendSlot // allocated with the first point
}

// slotIndex returns the ring index of slot s.
func slotIndex(s int64) int { return int((s%TrendPoints + TrendPoints) % TrendPoints) }

// quantize stores x scaled, clamped to the int16 range, or trendMissing.
func quantize(x float64, ok bool, scale float64) int16 {
	if !ok || math.IsNaN(x) {
		return trendMissing
	}
	return int16(math.Round(math.Max(-math.MaxInt16, math.Min(math.MaxInt16, x*scale))))
}

// recordTrend adds the unit's latest evaluation, of sample time t (Unix
// ns), to its trend. A step's point is its first sample's headroom and
// nearest margin, with q_max solved (once a step, not once a sample:
// the per-sample evaluation leaves it pending). u.mu must be held.
func (u *Unit) recordTrend(t int64) {
	tr := &u.trend
	s := t / int64(TrendStep)
	if t < 0 && t%int64(TrendStep) != 0 {
		s-- // floor
	}
	if tr.has && s <= tr.last {
		return // the step has its point: its first sample's
	}
	if !tr.has {
		tr.has, tr.first = true, s
		if tr.slots == nil {
			tr.slots = new([TrendPoints]trendSlot)
		}
	} else {
		for g := tr.last + 1; g < s && g <= tr.last+TrendPoints; g++ {
			tr.slots[slotIndex(g)] = trendSlot{trendMissing, trendMissing, trendMissing}
		}
	}
	tr.last = s
	u.complete()
	margin := quantize(u.nearestMargin(), true, trendMarginScale)
	up, down := u.eval.Headroom(u.pt.Q)
	tr.slots[slotIndex(s)] = trendSlot{
		up:     quantize(up.V, up.OK, trendHeadroomScale),
		down:   quantize(down.V, down.OK, trendHeadroomScale),
		margin: margin,
	}
}

// nearestMargin is the margin of the latest evaluation's binding limit;
// -1 (past the limit) when a bound does not exist at this active power.
// u.mu must be held.
func (u *Unit) nearestMargin() float64 {
	e := &u.eval
	if !e.Feasible {
		return -1
	}
	if m := e.Margins[e.Binding]; m.OK {
		return m.V
	}
	return math.NaN()
}

// TrendPoint is one step of a unit's trend. UpPU and DownPU are the
// reactive headroom (q_max − q, q − q_min) in pu of rated MVA; Margin is
// the nearest margin (see View.Eval.Binding). Each is NaN where it is not
// known: no sample in the step, or no bound.
type TrendPoint struct {
	Time                 time.Time // the start of the step, sample time
	UpPU, DownPU, Margin float64
}

// Trend appends the unit's trend, oldest first, to dst: one point per
// TrendStep of sample time up to the latest sample, at most TrendPoints.
func (u *Unit) Trend(dst []TrendPoint) []TrendPoint {
	u.mu.Lock()
	defer u.mu.Unlock()
	tr := &u.trend
	if !tr.has {
		return dst
	}
	val := func(x int16, scale float64) float64 {
		if x == trendMissing {
			return math.NaN()
		}
		return float64(x) / scale
	}
	for s := max(tr.first, tr.last-TrendPoints+1); s <= tr.last; s++ {
		p := tr.slots[slotIndex(s)]
		dst = append(dst, TrendPoint{Time: time.Unix(0, s*int64(TrendStep)),
			UpPU: val(p.up, trendHeadroomScale), DownPU: val(p.down, trendHeadroomScale), Margin: val(p.margin, trendMarginScale)})
	}
	return dst
}
