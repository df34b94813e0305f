package chart

import (
	"fmt"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"

	"github.com/genvelope/genvelope/limits"
)

// limiterMarks are the limiter and protection curves the unit page draws
// on the capability chart at the present voltage.
type limiterMarks struct {
	uel   *limits.UEL
	zones []limits.MhoZone
	vPU   float64
}

// WithLimiters draws the underexcitation limiter and the loss-of-field
// zones' P-Q images (coordination.md) at terminal voltage vPU; uel may be
// nil and zones empty.
func WithLimiters(uel *limits.UEL, zones []limits.MhoZone, vPU float64) Option {
	return func(c *config) {
		if uel != nil || len(zones) > 0 {
			c.lim = &limiterMarks{uel: uel, zones: append([]limits.MhoZone(nil), zones...), vPU: vPU}
		}
	}
}

// limiterLine is one curve of limiterLines with its legend label.
type limiterLine struct {
	label string
	line  plot.Plotter
	thumb plot.Thumbnailer
}

// limiterLines returns the UEL over the envelope's active-power range and
// the zones' images, (Q, P) in Mvar and MW.
func limiterLines(m *limiterMarks, pts []limits.EnvelopePoint, mva float64) ([]limiterLine, error) {
	if m == nil || len(pts) < 2 {
		return nil, nil
	}
	pal := newCoordPalette()
	var out []limiterLine
	if m.uel != nil {
		var xys plotter.XYs
		top := pts[len(pts)-1].P
		for i := 0; i <= 80; i++ {
			p := top * float64(i) / 80
			if q := m.uel.At(p, m.vPU); q.OK {
				xys = append(xys, plotter.XY{X: q.V * mva, Y: p * mva})
			}
		}
		if len(xys) >= 2 {
			l, err := plotter.NewLine(xys)
			if err != nil {
				return nil, fmt.Errorf("chart: UEL: %w", err)
			}
			l.LineStyle = solid(pal.uel, 1.8)
			out = append(out, limiterLine{LabelLimiterUEL, l, l})
		}
	}
	for k, z := range m.zones {
		cq, r := limits.MhoPQ(z.Offset, z.Diameter, m.vPU)
		l, err := plotter.NewLine(circleXY(cq*mva, 0, r*mva, 180))
		if err != nil {
			return nil, fmt.Errorf("chart: zone %d: %w", k+1, err)
		}
		label, col := LabelZone1, pal.zone1
		if k == 1 {
			label, col = LabelZone2, pal.zone2
		}
		l.LineStyle = dashed(col, 1.4, 4, 2)
		out = append(out, limiterLine{label, l, l})
	}
	return out, nil
}
