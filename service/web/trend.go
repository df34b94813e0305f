package web

import (
	"fmt"
	"html/template"
	"math"
	"strings"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

// The trend drawing, in SVG user units; the page scales it to its column.
const (
	trendW      = 760.0
	trendLeft   = 62.0 // room for the value labels
	trendRight  = 14.0
	trendSpan   = time.Duration(ingest.TrendPoints) * ingest.TrendStep
	trendTop1   = 26.0 // headroom panel
	trendBot1   = 118.0
	trendTop2   = 150.0 // margin panel
	trendBot2   = 222.0
	trendLabelY = 242.0
	trendH      = 250.0
)

// niceTicks returns tick values from lo to hi at a step of 1, 2 or 5
// times a power of ten, about n of them, and the widened range.
func niceTicks(lo, hi float64, n int) (ticks []float64, a, b float64) {
	if !(hi > lo) {
		hi = lo + 1
	}
	raw := (hi - lo) / float64(n)
	p := math.Pow(10, math.Floor(math.Log10(raw)))
	step := 10 * p
	for _, m := range []float64{1, 2, 5} {
		if m*p >= raw {
			step = m * p
			break
		}
	}
	a, b = math.Floor(lo/step)*step, math.Ceil(hi/step)*step
	for v := a; v <= b+step/2; v += step {
		ticks = append(ticks, v)
	}
	return ticks, a, b
}

// trendSeries is one line of the trend: its values and how it is drawn.
type trendSeries struct {
	vals  []float64
	class string
}

// trendPanel draws one panel: its axis, ticks and lines.
func trendPanel(b *strings.Builder, title string, xs []float64, series []trendSeries, top, bot float64, floorLo, floorHi float64, marks func(y func(float64) float64)) {
	lo, hi := floorLo, floorHi
	for _, s := range series {
		for _, v := range s.vals {
			if !math.IsNaN(v) {
				lo, hi = math.Min(lo, v), math.Max(hi, v)
			}
		}
	}
	ticks, a, z := niceTicks(lo, hi, 4)
	y := func(v float64) float64 { return bot - (v-a)/(z-a)*(bot-top) }
	fmt.Fprintf(b, `<text class="gv-trend-title" x="%g" y="%g">%s</text>`, trendLeft, top-10, template.HTMLEscapeString(title))
	for _, t := range ticks {
		fmt.Fprintf(b, `<line class="gv-trend-grid" x1="%g" x2="%g" y1="%.1f" y2="%.1f"/>`, trendLeft, trendW-trendRight, y(t), y(t))
		fmt.Fprintf(b, `<text class="gv-trend-tick" x="%g" y="%.1f" text-anchor="end">%s</text>`, trendLeft-6, y(t)+4, strings.Replace(fmt.Sprintf("%g", t), "-", "−", 1))
	}
	if marks != nil {
		marks(y)
	}
	for _, s := range series {
		var d strings.Builder
		pen := false
		for i, v := range s.vals {
			if math.IsNaN(v) {
				pen = false
				continue
			}
			cmd := "L"
			if !pen {
				cmd = "M"
			}
			fmt.Fprintf(&d, "%s%.1f %.1f", cmd, xs[i], y(v))
			if !pen && (i+1 == len(s.vals) || math.IsNaN(s.vals[i+1])) {
				d.WriteString("h0.1") // a lone point: a dot under the round cap
			}
			pen = true
		}
		if d.Len() > 0 {
			fmt.Fprintf(b, `<path class="%s" d="%s"/>`, s.class, d.String())
		}
	}
	fmt.Fprintf(b, `<line class="gv-trend-axis" x1="%g" x2="%g" y1="%g" y2="%g"/>`, trendLeft, trendLeft, top, bot)
}

// trendSVG draws a unit's trend (ingest.Unit.Trend) of a unit rated mva
// over the last six hours of sample time: the reactive headroom up and
// down in Mvar, and the nearest margin in percent with the limit and the
// warning threshold warn (a ratio; NaN for none).
func trendSVG(pts []ingest.TrendPoint, mva, warn float64) template.HTML {
	if len(pts) == 0 {
		return template.HTML(`<p class="trend-empty">No trend yet: it gains a point for every minute of sample time.</p>`)
	}
	end := pts[len(pts)-1].Time.Add(ingest.TrendStep)
	start := end.Add(-trendSpan)
	xOf := func(t time.Time) float64 {
		return trendLeft + float64(t.Sub(start))/float64(trendSpan)*(trendW-trendLeft-trendRight)
	}
	xs := make([]float64, len(pts))
	up, down, margin := make([]float64, len(pts)), make([]float64, len(pts)), make([]float64, len(pts))
	for i, p := range pts {
		xs[i] = xOf(p.Time.Add(ingest.TrendStep / 2))
		up[i], down[i], margin[i] = p.UpPU*mva, p.DownPU*mva, 100*p.Margin
	}
	var b strings.Builder
	fmt.Fprintf(&b, `<svg class="gv-trend" viewBox="0 0 %g %g" xmlns="http://www.w3.org/2000/svg" role="img" aria-label="Reactive headroom and nearest margin over the last six hours">`, trendW, trendH)
	trendPanel(&b, "Reactive headroom, Mvar: ↑ up (solid), ↓ down (dashed)", xs,
		[]trendSeries{{up, "gv-trend-up"}, {down, "gv-trend-down"}}, trendTop1, trendBot1, 0, 1, nil)
	trendPanel(&b, "Nearest margin, %", xs, []trendSeries{{margin, "gv-trend-margin"}}, trendTop2, trendBot2, -5, 10,
		func(y func(float64) float64) {
			// Past the limit: the state is shaded, the line labelled.
			fmt.Fprintf(&b, `<rect class="gv-trend-past" x="%g" y="%.1f" width="%g" height="%.1f"/>`, trendLeft, y(0), trendW-trendLeft-trendRight, math.Max(0, trendBot2-y(0)))
			fmt.Fprintf(&b, `<line class="gv-trend-limit" x1="%g" x2="%g" y1="%.1f" y2="%.1f"/>`, trendLeft, trendW-trendRight, y(0), y(0))
			if !math.IsNaN(warn) {
				fmt.Fprintf(&b, `<line class="gv-trend-warn" x1="%g" x2="%g" y1="%.1f" y2="%.1f"/>`, trendLeft, trendW-trendRight, y(100*warn), y(100*warn))
				fmt.Fprintf(&b, `<text class="gv-trend-tick" x="%g" y="%.1f" text-anchor="end">warning</text>`, trendW-trendRight-2, y(100*warn)-4)
			}
			fmt.Fprintf(&b, `<text class="gv-trend-tick" x="%g" y="%.1f" text-anchor="end">limit</text>`, trendW-trendRight-2, y(0)+13)
		})
	for h := 6; h >= 0; h-- {
		x := xOf(end.Add(-time.Duration(h) * time.Hour))
		label := fmt.Sprintf("−%d h", h)
		if h == 0 {
			label = "latest"
		}
		anchor := "middle"
		if h == 0 {
			anchor = "end"
		}
		fmt.Fprintf(&b, `<line class="gv-trend-grid" x1="%.1f" x2="%.1f" y1="%g" y2="%g"/>`, x, x, trendTop1, trendBot2)
		fmt.Fprintf(&b, `<text class="gv-trend-tick" x="%.1f" y="%g" text-anchor="%s">%s</text>`, x, trendLabelY, anchor, label)
	}
	b.WriteString(`</svg>`)
	// The lowest margin of the window, in words beside the drawing.
	low, at := math.Inf(1), time.Time{}
	for _, p := range pts {
		if p.Margin < low {
			low, at = p.Margin, p.Time
		}
	}
	if !math.IsInf(low, 1) {
		fmt.Fprintf(&b, `<p class="trend-low">Lowest nearest margin in the window: <strong>%s</strong>, %s before the latest sample.</p>`,
			fmtPct(&low, 1).Text, fmtAge(end.Sub(at)-ingest.TrendStep))
	}
	// Built here from numbers and fixed words only.
	return template.HTML(b.String())
}
