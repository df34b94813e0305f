package chart

import (
	"bytes"
	"fmt"
	"image/color"
	"io"
	"math"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/genvelope/genvelope/limits"
)

// The coordination study's charts (coordination.md): the P-Q chart with
// the limiters and the loss-of-field zones, the R-X chart, the
// time-current chart and the V/Hz chart. Same style as the capability
// chart; each is a self-contained SVG for the printable report.

// Legend labels of the coordination charts.
const (
	LabelLimiterUEL    = "underexcitation limiter (UEL)"
	LabelZone1         = "loss-of-field zone 1"
	LabelZone2         = "loss-of-field zone 2"
	LabelFailing       = "failing check point"
	LabelManualRX      = "manual stability limit"
	LabelLowerRX       = "capability lower boundary"
	LabelOEL           = "overexcitation limiter (OEL)"
	LabelFieldRelay    = "field overcurrent relay"
	LabelFieldCap      = "field capability, IEEE C50.13"
	LabelSCL           = "stator current limiter (SCL)"
	LabelArmatureCap   = "armature capability, IEEE C50.13"
	LabelVHzLimiter    = "V/Hz limiter setpoint"
	LabelVHzRelay      = "V/Hz relay stage"
	LabelGeneratorVHz  = "generator, 1.05 pu continuous"
	LabelTransformerLd = "transformer at rated load"
	LabelTransformerNL = "transformer at no load"
	coordWidth         = 9 * vg.Inch
	coordHeight        = 5.2 * vg.Inch
	coordLegendWidth   = 2.9 * vg.Inch
)

// ClassCoordChart is the class of every coordination chart's svg element
// in the report.
const ClassCoordChart = "gv-coord-chart"

// coordPalette adds the coordination colours to the chart palette.
type coordPalette struct {
	palette
	uel, zone1, zone2, fail, oel, relay, scl, limiter, transformer color.Color
}

func newCoordPalette() coordPalette {
	rgb := func(r, g, b uint8) color.Color { return color.RGBA{R: r, G: g, B: b, A: 0xff} }
	return coordPalette{
		palette:     defaultPalette(),
		uel:         rgb(0x00, 0x97, 0xa7),
		zone1:       rgb(0xb0, 0x3a, 0x2e),
		zone2:       rgb(0xd9, 0x82, 0x2b),
		fail:        rgb(0xc0, 0x28, 0x1e),
		oel:         rgb(0x00, 0x6d, 0x8f),
		relay:       rgb(0xb0, 0x3a, 0x2e),
		scl:         rgb(0x11, 0x78, 0x64),
		limiter:     rgb(0x00, 0x6d, 0x8f),
		transformer: rgb(0x6c, 0x34, 0x83),
	}
}

// newCoordPlot returns a plot in the chart's style.
func newCoordPlot(title, xLabel, yLabel string, pal coordPalette) *plot.Plot {
	p := plot.New()
	p.Title.Text = title
	restyle(&p.Title.TextStyle, titleFontSize-1, pal.text)
	p.Title.Padding = 0.1 * vg.Inch
	p.X.Label.Text, p.Y.Label.Text = xLabel, yLabel
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		restyle(&a.Label.TextStyle, bodyFontSize-1, pal.text)
		restyle(&a.Tick.Label, bodyFontSize-2, pal.text)
		a.Tick.Marker = ticks{target: 7}
	}
	g := plotter.NewGrid()
	g.Vertical = draw.LineStyle{Color: pal.grid, Width: vg.Points(0.5)}
	g.Horizontal = g.Vertical
	p.Add(g)
	restyle(&p.Legend.TextStyle, bodyFontSize-2, pal.text)
	p.Legend.Top = true
	p.Legend.Padding = vg.Points(2)
	p.Legend.ThumbnailWidth = 0.35 * vg.Inch
	return p
}

// addLine adds a line through xys (at least two points) with a legend
// label ("" for none).
func addLine(p *plot.Plot, label string, xys plotter.XYs, st draw.LineStyle) error {
	if len(xys) < 2 {
		return nil
	}
	l, err := plotter.NewLine(xys)
	if err != nil {
		return fmt.Errorf("chart: %s: %w", label, err)
	}
	l.LineStyle = st
	p.Add(l)
	if label != "" {
		p.Legend.Add(label, l)
	}
	return nil
}

func solid(c color.Color, w float64) draw.LineStyle {
	return draw.LineStyle{Color: c, Width: vg.Points(w)}
}

func dashed(c color.Color, w float64, d ...float64) draw.LineStyle {
	st := solid(c, w)
	for _, x := range d {
		st.Dashes = append(st.Dashes, vg.Points(x))
	}
	return st
}

// writeCoordPlot writes p as SVG, white background, fonts not embedded.
func writeCoordPlot(w io.Writer, p *plot.Plot) error {
	c := vgsvg.New(coordWidth, coordHeight)
	dc := draw.New(c)
	dc.FillPolygon(color.White, []vg.Point{
		{X: dc.Min.X, Y: dc.Min.Y}, {X: dc.Max.X, Y: dc.Min.Y},
		{X: dc.Max.X, Y: dc.Max.Y}, {X: dc.Min.X, Y: dc.Max.Y},
	})
	// The plot on the left, its legend beside it on the right, so that
	// the legend never hides a curve.
	lg := p.Legend
	p.Legend = plot.NewLegend()
	p.Draw(draw.Crop(dc, 0.05*vg.Inch, -coordLegendWidth, 0.05*vg.Inch, -0.05*vg.Inch))
	lg.Top, lg.Left = true, true
	lg.YOffs = -0.35 * vg.Inch
	lg.Draw(draw.Crop(dc, coordWidth-coordLegendWidth+0.1*vg.Inch, 0, 0, -0.05*vg.Inch))
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return fmt.Errorf("chart: drawing the SVG: %w", err)
	}
	out := bytes.ReplaceAll(buf.Bytes(), []byte("font-family:Liberation Sans;"), []byte(fontFallback))
	out = bytes.Replace(out, []byte("<svg "), []byte(`<svg class="`+ClassCoordChart+`" `), 1)
	_, err := w.Write(out)
	return err
}

// circleXY returns n+1 points of the circle with centre (cx, cy) and
// radius r, closed.
func circleXY(cx, cy, r float64, n int) plotter.XYs {
	xys := make(plotter.XYs, n+1)
	for i := range xys {
		th := 2 * math.Pi * float64(i) / float64(n)
		xys[i] = plotter.XY{X: cx + r*math.Cos(th), Y: cy + r*math.Sin(th)}
	}
	return xys
}

// CoordPQ draws the P-Q chart at terminal voltage v (pu): the capability
// (armature, field, end region), the stability limit on the unit's basis,
// the UEL, the loss-of-field zones' images and the grid points at v where
// a check fails. P (MW) up, Q (Mvar) across, underexcited to the left.
func CoordPQ(w io.Writer, title string, m *limits.Unit, s *limits.Settings, st *limits.Study, base limits.Base, v float64) error {
	pal := newCoordPalette()
	mva := base.MVA
	p := newCoordPlot(title, "reactive power Q (Mvar)   ← underexcited · overexcited →", "active power P (MW)", pal)
	par := m.Params()
	pts := m.Envelope(v, 0, false, 81)
	curves := []struct {
		label string
		get   func(limits.EnvelopePoint) limits.Bound
		style draw.LineStyle
	}{
		{LabelArmature, func(e limits.EnvelopePoint) limits.Bound { return e.ArmatureUp }, solid(pal.armature, 1.6)},
		{"", func(e limits.EnvelopePoint) limits.Bound { return e.ArmatureDown }, solid(pal.armature, 1.6)},
		{LabelField, func(e limits.EnvelopePoint) limits.Bound { return e.Field }, solid(pal.field, 1.6)},
		{"stability limit (" + par.Basis.String() + " basis)", func(e limits.EnvelopePoint) limits.Bound { return e.Stability }, dashed(pal.stability, 1.3, 5, 3)},
		{LabelEndRegion, func(e limits.EnvelopePoint) limits.Bound { return e.EndRegion }, dashed(pal.endRegion, 1.4, 7, 2, 1.5, 2)},
	}
	for _, c := range curves {
		for i, seg := range segments(pts, mva, c.get) {
			label := c.label
			if i > 0 {
				label = ""
			}
			if err := addLine(p, label, seg, c.style); err != nil {
				return err
			}
		}
	}
	pTop := par.PMax
	qLo, qHi := -v*1.15, v*1.05
	if par.UEL != nil {
		var xys plotter.XYs
		for i := 0; i <= 80; i++ {
			pp := pTop * float64(i) / 80
			if q := par.UEL.At(pp, v); q.OK {
				xys = append(xys, plotter.XY{X: q.V * mva, Y: pp * mva})
			}
		}
		if err := addLine(p, LabelLimiterUEL, xys, solid(pal.uel, 2)); err != nil {
			return err
		}
	}
	if lof := s.LossOfField; lof != nil {
		for k, z := range lof.Zones {
			cq, r := limits.MhoPQ(z.Offset, z.Diameter, v)
			xys := circleXY(cq*mva, 0, r*mva, 180)
			// (Q, P): the circle's x is Q, its y is P.
			label, col := LabelZone1, pal.zone1
			if k == 1 {
				label, col = LabelZone2, pal.zone2
			}
			if err := addLine(p, fmt.Sprintf("%s (%.1f s)", label, z.DelayS), xys, dashed(col, 1.5, 4, 2)); err != nil {
				return err
			}
		}
	}
	if st != nil {
		var fails plotter.XYs
		for _, c := range st.Checks[:limits.CheckOELBeforeFieldCapability] {
			for _, f := range c.Points {
				if f.V != v {
					continue
				}
				var q limits.Bound
				if par.UEL != nil {
					q = par.UEL.At(f.P, v)
				}
				if q.OK {
					fails = append(fails, plotter.XY{X: q.V * mva, Y: f.P * mva})
				}
			}
		}
		if len(fails) > 0 {
			sc, err := plotter.NewScatter(fails)
			if err != nil {
				return err
			}
			sc.GlyphStyle = draw.GlyphStyle{Color: pal.fail, Radius: vg.Points(5), Shape: draw.CrossGlyph{}}
			p.Add(sc)
			p.Legend.Add(LabelFailing, sc)
		}
	}
	p.X.Min, p.X.Max = qLo*mva, qHi*mva
	p.Y.Min, p.Y.Max = 0, 1.1*pTop*mva
	p.Legend.Left = true
	return writeCoordPlot(w, p)
}

// ohmTicks labels secondary-ohm ticks with the primary ohms beside them.
type ohmTicks struct {
	primaryPerSecondary float64
}

func (t ohmTicks) Ticks(lo, hi float64) []plot.Tick {
	out := ticks{target: 7}.Ticks(lo, hi)
	for i := range out {
		if out[i].Label != "" {
			out[i].Label = fmt.Sprintf("%s (%.2f)", out[i].Label, out[i].Value*t.primaryPerSecondary)
		}
	}
	return out
}

// CoordRX draws the R-X chart: the loss-of-field zones, the manual
// stability circle and the capability's lower boundary at 1.0 pu mapped
// through Z = v^2 / (p - j q), in secondary ohms with primary ohms in
// brackets when the relay's ratios are known, else in primary ohms.
func CoordRX(w io.Writer, title string, m *limits.Unit, s *limits.Settings, base limits.Base) error {
	pal := newCoordPalette()
	par := m.Params()
	zb := limits.ImpedanceBaseOhm(base.KV, base.MVA)
	k, unit := zb, "primary Ω"
	lof := s.LossOfField
	if lof != nil && lof.SecondaryPerPU > 0 {
		k, unit = lof.SecondaryPerPU, "secondary Ω (primary Ω)"
	}
	p := newCoordPlot(title, "resistance R, "+unit, "reactance X, "+unit, pal)
	if unit != "primary Ω" {
		p.X.Tick.Marker = ohmTicks{primaryPerSecondary: zb / k}
		p.Y.Tick.Marker = ohmTicks{primaryPerSecondary: zb / k}
	}
	lo, hi := -par.Xd*1.1, par.Xe+0.3
	if lof != nil {
		for i, z := range lof.Zones {
			label, col := LabelZone1, pal.zone1
			if i == 1 {
				label, col = LabelZone2, pal.zone2
			}
			xys := circleXY(0, -(z.Offset+z.Diameter/2)*k, z.Diameter/2*k, 180)
			if err := addLine(p, fmt.Sprintf("%s (%.2f, %.2f)", label, z.Offset*k, z.Diameter*k), xys, solid(col, 1.6)); err != nil {
				return err
			}
			lo = math.Min(lo, -(z.Offset+z.Diameter)*1.1)
		}
	}
	cx, r := limits.ManualStabilityRX(par.Xd, par.Xe)
	if err := addLine(p, LabelManualRX, circleXY(0, cx*k, r*k, 180), dashed(pal.stability, 1.3, 5, 3)); err != nil {
		return err
	}
	xLo, xHi := -0.6*(hi-lo), 0.6*(hi-lo)
	var xys plotter.XYs
	for _, e := range m.Envelope(1, 0, false, 81) {
		if !e.QMin.OK {
			continue
		}
		if R, X, ok := limits.ApparentImpedance(e.P, e.QMin.V, 1); ok {
			xys = append(xys, plotter.XY{X: R * k, Y: X * k})
			xLo, xHi = math.Min(xLo, R*1.05), math.Max(xHi, R*1.05)
			lo, hi = math.Min(lo, X*1.05), math.Max(hi, X*1.05)
		}
	}
	if err := addLine(p, LabelLowerRX+" at 1.00 pu", xys, solid(pal.practical, 1.6)); err != nil {
		return err
	}
	p.Y.Min, p.Y.Max = lo*k, hi*k
	p.X.Min, p.X.Max = xLo*k, xHi*k
	p.Legend.Left = false
	return writeCoordPlot(w, p)
}

// CoordTime draws the time-current chart: the OEL and the field
// overcurrent relay against the C50.13 field capability, and the SCL
// against the C50.13 armature capability; current in pu of the winding's
// rating across, time in s up on a log scale.
func CoordTime(w io.Writer, title string, s *limits.Settings) error {
	pal := newCoordPalette()
	p := newCoordPlot(title, "current, pu of the winding's continuous rating", "time (s)", pal)
	p.Y.Scale = plot.LogScale{}
	p.Y.Tick.Marker = plot.LogTicks{Prec: -1}
	const tMin, tMax = 1.0, 1000.0
	curve := func(f func(x float64) float64) plotter.XYs {
		var xys plotter.XYs
		for n := 100; n <= 240; n++ {
			x := float64(n) / 100
			t := f(x)
			if math.IsInf(t, 1) || t > tMax {
				continue
			}
			xys = append(xys, plotter.XY{X: x, Y: math.Max(t, tMin)})
		}
		return xys
	}
	add := func(label string, c *limits.InverseTime, st draw.LineStyle) error {
		if c == nil {
			return nil
		}
		return addLine(p, label, curve(c.Time), st)
	}
	if err := addLine(p, LabelFieldCap, curve(func(x float64) float64 { return limits.CapabilityTime(limits.FieldK, x) }), solid(pal.field, 2)); err != nil {
		return err
	}
	if err := addLine(p, LabelArmatureCap, curve(func(x float64) float64 { return limits.CapabilityTime(limits.ArmatureK, x) }), dashed(pal.armature, 2, 6, 3)); err != nil {
		return err
	}
	if err := add(LabelOEL, s.OEL, solid(pal.oel, 1.6)); err != nil {
		return err
	}
	if err := add(LabelFieldRelay, s.FieldOvercurrent, solid(pal.relay, 1.6)); err != nil {
		return err
	}
	if err := add(LabelSCL, s.SCL, dashed(pal.scl, 1.6, 3, 2)); err != nil {
		return err
	}
	p.X.Min, p.X.Max = 1.0, 2.4
	p.Y.Min, p.Y.Max = tMin, tMax
	p.Legend.Left = false
	return writeCoordPlot(w, p)
}

// CoordVHz draws the V/Hz chart: the limiter's setpoint, the relay's
// definite-time stages, the generator's continuous capability and the
// transformer's at rated load and no load, on the generator base; time
// across on a log scale.
func CoordVHz(w io.Writer, title string, s *limits.Settings) error {
	pal := newCoordPalette()
	p := newCoordPlot(title, "time (s)", "volts per hertz, pu on the generator base", pal)
	p.X.Scale = plot.LogScale{}
	p.X.Tick.Marker = plot.LogTicks{Prec: -1}
	const tMin, tMax = 0.1, 10000.0
	flat := func(y float64) plotter.XYs { return plotter.XYs{{X: tMin, Y: y}, {X: tMax, Y: y}} }
	if err := addLine(p, LabelGeneratorVHz, flat(limits.GeneratorVHzContinuous), solid(pal.field, 2)); err != nil {
		return err
	}
	yHi := 1.15
	if t := s.Transformer; t != nil {
		ld, nl := limits.TransformerVHzCapability(t.LVRatio)
		if err := addLine(p, fmt.Sprintf("%s (%.3f pu)", LabelTransformerLd, ld), flat(ld), solid(pal.transformer, 1.6)); err != nil {
			return err
		}
		if err := addLine(p, fmt.Sprintf("%s (%.3f pu)", LabelTransformerNL, nl), flat(nl), dashed(pal.transformer, 1.4, 5, 3)); err != nil {
			return err
		}
	}
	if s.VHzLimiter > 0 {
		if err := addLine(p, fmt.Sprintf("%s (%.3f pu)", LabelVHzLimiter, s.VHzLimiter), flat(s.VHzLimiter), solid(pal.limiter, 2)); err != nil {
			return err
		}
	}
	for i, g := range s.VHzRelay {
		label := ""
		if i == 0 {
			label = LabelVHzRelay
		}
		yHi = math.Max(yHi, g.Pickup+0.05)
		d := math.Max(g.DelayS, tMin)
		if err := addLine(p, label, plotter.XYs{{X: d, Y: yHi + 1}, {X: d, Y: g.Pickup}, {X: tMax, Y: g.Pickup}}, solid(pal.relay, 1.6)); err != nil {
			return err
		}
	}
	p.X.Min, p.X.Max = tMin, tMax
	p.Y.Min, p.Y.Max = 0.98, yHi
	p.Legend.Left = false
	return writeCoordPlot(w, p)
}
