// Package chart draws a generator's capability chart as SVG: active power
// P in MW up the vertical axis, reactive power Q in Mvar along the
// horizontal axis with underexcited operation to the left, every limit
// curve drawn and named, an optional operating point and trail, and the
// genvelope caution as a caption.
package chart

import (
	"bytes"
	"errors"
	"fmt"
	"image/color"
	"io"
	"math"
	"strconv"
	"strings"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/text"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

// The names of the curves, as shown in the legend.
const (
	LabelRegion          = "continuous capability region"
	LabelArmature        = "armature current limit"
	LabelField           = "field current limit"
	LabelStability       = "steady-state stability limit"
	LabelPractical       = "practical stability limit"
	LabelEndRegion       = "stator end-region limit"
	LabelUEL             = "underexcitation limiter (UEL)"
	LabelPMax            = "prime-mover limit p_max"
	LabelPMin            = "prime-mover limit p_min"
	LabelOperatingPoint  = "operating point"
	LabelOperatingTrail  = "recent operation"
	defaultWidth         = 10 * vg.Inch
	defaultHeight        = 7 * vg.Inch
	legendWidthFraction  = 0.30
	captionFontSize      = 9
	bodyFontSize         = 10
	titleFontSize        = 13
	legendThumbnailWidth = 0.45 * vg.Inch
)

// Point is an operating point in engineering units.
type Point struct {
	PMW, QMvar float64
}

// An Option changes what Capability draws.
type Option func(*config)

type config struct {
	pMaxMW, pMinMW float64
	hasPrimeMover  bool
	op             *Point
	trail          []Point
	width, height  vg.Length
	embedFonts     bool
	lim            *limiterMarks // coord_marks.go
}

// WithPrimeMover draws the prime mover's active-power range as lines at
// pMinMW and pMaxMW and shades the capability region between them.
func WithPrimeMover(pMinMW, pMaxMW float64) Option {
	return func(c *config) { c.pMinMW, c.pMaxMW, c.hasPrimeMover = pMinMW, pMaxMW, true }
}

// WithOperatingPoint marks the present operating point.
func WithOperatingPoint(p Point) Option {
	return func(c *config) { q := p; c.op = &q }
}

// WithTrail draws recent operation, oldest first.
func WithTrail(pts []Point) Option {
	return func(c *config) { c.trail = append([]Point(nil), pts...) }
}

// WithSize sets the size of the drawing (default 10 × 7 inches).
func WithSize(w, h vg.Length) Option {
	return func(c *config) { c.width, c.height = w, h }
}

// WithEmbeddedFonts embeds the fonts in the SVG, which makes it larger but
// look the same everywhere.
func WithEmbeddedFonts() Option {
	return func(c *config) { c.embedFonts = true }
}

// palette holds the chart's colours: muted, and distinct in grey scale too.
type palette struct {
	region, armature, field, stability, practical, endRegion, uel color.Color
	prime, point, trail, axisZero, grid, text, caption            color.Color
}

func defaultPalette() palette {
	rgb := func(r, g, b uint8) color.Color { return color.RGBA{R: r, G: g, B: b, A: 0xff} }
	return palette{
		region:    rgb(0xe6, 0xee, 0xf3),
		armature:  rgb(0x1b, 0x4f, 0x72),
		field:     rgb(0xa0, 0x40, 0x00),
		stability: rgb(0x80, 0x80, 0x80),
		practical: rgb(0x6c, 0x34, 0x83),
		endRegion: rgb(0x11, 0x78, 0x64),
		uel:       rgb(0xb0, 0x7a, 0x00),
		prime:     rgb(0x4d, 0x56, 0x5e),
		point:     rgb(0xc0, 0x28, 0x1e),
		trail:     rgb(0xe0, 0x8e, 0x6b),
		axisZero:  rgb(0xb0, 0xb0, 0xb0),
		grid:      rgb(0xe4, 0xe4, 0xe4),
		text:      rgb(0x22, 0x22, 0x22),
		caption:   rgb(0x55, 0x55, 0x55),
	}
}

// sans returns the chart's font at size pt.
func sans(pt vg.Length) font.Font {
	return font.Font{Typeface: "Liberation", Variant: "Sans", Size: pt}
}

// restyle sets the font and colour of st, keeping its alignment.
func restyle(st *text.Style, pt vg.Length, c color.Color) {
	st.Font = sans(pt)
	st.Color = c
}

func textStyle(pt vg.Length, c color.Color) text.Style {
	return text.Style{Color: c, Font: sans(pt), Handler: plot.DefaultTextHandler}
}

// Capability writes the capability chart of the envelope pts (from
// limits.Unit.Envelope, per unit on base) to w as SVG.
func Capability(w io.Writer, title string, pts []limits.EnvelopePoint, base limits.Base, opts ...Option) error {
	if len(pts) < 2 {
		return errors.New("chart: the envelope needs at least two points")
	}
	if !(base.MVA > 0) {
		return errors.New("chart: the base needs a positive MVA")
	}
	cfg := config{width: defaultWidth, height: defaultHeight}
	pal := defaultPalette()
	for _, o := range opts {
		o(&cfg)
	}

	p := plot.New()
	p.Title.Text = title
	restyle(&p.Title.TextStyle, titleFontSize, pal.text)
	p.Title.Padding = 0.15 * vg.Inch
	p.X.Label.Text = "reactive power Q (Mvar)   ← underexcited · overexcited →"
	p.Y.Label.Text = "active power P (MW)"
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		restyle(&a.Label.TextStyle, bodyFontSize, pal.text)
		restyle(&a.Tick.Label, bodyFontSize-1, pal.text)
		a.Tick.Marker = ticks{target: 8}
	}
	grid := plotter.NewGrid()
	grid.Vertical = draw.LineStyle{Color: pal.grid, Width: vg.Points(0.5)}
	grid.Horizontal = grid.Vertical
	p.Add(grid)

	mva := base.MVA
	type entry struct {
		label string
		thumb plot.Thumbnailer
	}
	var legend []entry

	if region := regionPolygon(pts, mva, cfg); len(region) >= 3 {
		poly, err := plotter.NewPolygon(region)
		if err != nil {
			return fmt.Errorf("chart: capability region: %w", err)
		}
		poly.Color = pal.region
		poly.LineStyle.Width = 0
		p.Add(poly)
		legend = append(legend, entry{LabelRegion, poly})
	}

	curves := []struct {
		label string
		get   func(limits.EnvelopePoint) limits.Bound
		style draw.LineStyle
	}{
		{LabelArmature, func(e limits.EnvelopePoint) limits.Bound { return e.ArmatureUp }, draw.LineStyle{Color: pal.armature, Width: vg.Points(1.8)}},
		{"", func(e limits.EnvelopePoint) limits.Bound { return e.ArmatureDown }, draw.LineStyle{Color: pal.armature, Width: vg.Points(1.8)}},
		{LabelField, func(e limits.EnvelopePoint) limits.Bound { return e.Field }, draw.LineStyle{Color: pal.field, Width: vg.Points(1.8)}},
		{LabelStability, func(e limits.EnvelopePoint) limits.Bound { return e.Stability }, draw.LineStyle{Color: pal.stability, Width: vg.Points(1.2), Dashes: []vg.Length{vg.Points(5), vg.Points(3)}}},
		{LabelPractical, func(e limits.EnvelopePoint) limits.Bound { return e.Practical }, draw.LineStyle{Color: pal.practical, Width: vg.Points(1.6)}},
		{LabelEndRegion, func(e limits.EnvelopePoint) limits.Bound { return e.EndRegion }, draw.LineStyle{Color: pal.endRegion, Width: vg.Points(1.6), Dashes: []vg.Length{vg.Points(7), vg.Points(2), vg.Points(1.5), vg.Points(2)}}},
		{LabelUEL, func(e limits.EnvelopePoint) limits.Bound { return e.UEL }, draw.LineStyle{Color: pal.uel, Width: vg.Points(1.6), Dashes: []vg.Length{vg.Points(2), vg.Points(2)}}},
	}
	for _, c := range curves {
		var first plot.Thumbnailer
		for _, seg := range segments(pts, mva, c.get) {
			l, err := plotter.NewLine(seg)
			if err != nil {
				return fmt.Errorf("chart: %s: %w", c.label, err)
			}
			l.LineStyle = c.style
			p.Add(l)
			if first == nil {
				first = l
			}
		}
		if first != nil && c.label != "" {
			legend = append(legend, entry{c.label, first})
		}
	}

	extra, err := limiterLines(cfg.lim, pts, mva)
	if err != nil {
		return err
	}
	for _, e := range extra {
		p.Add(e.line)
		legend = append(legend, entry{e.label, e.thumb})
	}

	// The Q range, for the horizontal lines and the axes.
	qLo, qHi := 0.0, 0.0
	for _, e := range pts {
		for _, b := range []limits.Bound{e.ArmatureUp, e.ArmatureDown, e.Field, e.Stability, e.Practical, e.EndRegion, e.UEL} {
			if b.OK && !math.IsNaN(b.V) && !math.IsInf(b.V, 0) {
				qLo, qHi = math.Min(qLo, b.V*mva), math.Max(qHi, b.V*mva)
			}
		}
	}
	pTop := pts[len(pts)-1].P * mva
	if cfg.op != nil {
		qLo, qHi = math.Min(qLo, cfg.op.QMvar), math.Max(qHi, cfg.op.QMvar)
		pTop = math.Max(pTop, cfg.op.PMW)
	}
	for _, t := range cfg.trail {
		qLo, qHi = math.Min(qLo, t.QMvar), math.Max(qHi, t.QMvar)
		pTop = math.Max(pTop, t.PMW)
	}
	span := qHi - qLo
	if span <= 0 {
		span = mva
	}
	qLo, qHi = qLo-0.06*span, qHi+0.06*span

	zero, err := plotter.NewLine(plotter.XYs{{X: 0, Y: 0}, {X: 0, Y: 1.08 * pTop}})
	if err != nil {
		return fmt.Errorf("chart: axis line: %w", err)
	}
	zero.LineStyle = draw.LineStyle{Color: pal.axisZero, Width: vg.Points(0.8)}
	p.Add(zero)

	if cfg.hasPrimeMover {
		lines := []struct {
			label, tag string
			pMW        float64
			dashes     []vg.Length
		}{
			{LabelPMax, "p_max", cfg.pMaxMW, []vg.Length{vg.Points(9), vg.Points(3)}},
			{LabelPMin, "p_min", cfg.pMinMW, []vg.Length{vg.Points(3), vg.Points(3)}},
		}
		for _, pl := range lines {
			if pl.pMW <= 0 || math.IsNaN(pl.pMW) || math.IsInf(pl.pMW, 0) {
				continue
			}
			l, err := plotter.NewLine(plotter.XYs{{X: qLo, Y: pl.pMW}, {X: qHi, Y: pl.pMW}})
			if err != nil {
				return fmt.Errorf("chart: %s: %w", pl.label, err)
			}
			l.LineStyle = draw.LineStyle{Color: pal.prime, Width: vg.Points(1.2), Dashes: pl.dashes}
			p.Add(l)
			legend = append(legend, entry{pl.label, l})
			lab, err := plotter.NewLabels(plotter.XYLabels{
				XYs:    plotter.XYs{{X: qLo, Y: pl.pMW}},
				Labels: []string{fmt.Sprintf("%s %.0f MW", pl.tag, pl.pMW)},
			})
			if err != nil {
				return fmt.Errorf("chart: %s label: %w", pl.label, err)
			}
			st := textStyle(bodyFontSize-2, pal.prime)
			st.YAlign = text.YBottom
			lab.TextStyle = []text.Style{st}
			lab.Offset = vg.Point{X: vg.Points(3), Y: vg.Points(3)}
			p.Add(lab)
			pTop = math.Max(pTop, pl.pMW)
		}
	}

	if len(cfg.trail) >= 2 {
		xys := make(plotter.XYs, len(cfg.trail))
		for i, t := range cfg.trail {
			xys[i] = plotter.XY{X: t.QMvar, Y: t.PMW}
		}
		l, err := plotter.NewLine(xys)
		if err != nil {
			return fmt.Errorf("chart: trail: %w", err)
		}
		l.LineStyle = draw.LineStyle{Color: pal.trail, Width: vg.Points(1)}
		p.Add(l)
		legend = append(legend, entry{LabelOperatingTrail, l})
	}
	if op := cfg.op; op != nil {
		s, err := plotter.NewScatter(plotter.XYs{{X: op.QMvar, Y: op.PMW}})
		if err != nil {
			return fmt.Errorf("chart: operating point: %w", err)
		}
		s.GlyphStyle = draw.GlyphStyle{Color: pal.point, Radius: vg.Points(4), Shape: draw.RingGlyph{}}
		p.Add(s)
		legend = append(legend, entry{LabelOperatingPoint, s})
	}

	p.X.Min, p.X.Max = qLo, qHi
	p.Y.Min, p.Y.Max = 0, 1.08*pTop

	// Layout: the plot on the left, the legend on the right, the caption
	// along the bottom.
	var c *vgsvg.Canvas
	if cfg.embedFonts {
		c = vgsvg.NewWith(vgsvg.UseWH(cfg.width, cfg.height), vgsvg.EmbedFonts(true))
	} else {
		c = vgsvg.New(cfg.width, cfg.height)
	}
	dc := draw.New(c)
	dc.FillPolygon(color.White, []vg.Point{
		{X: dc.Min.X, Y: dc.Min.Y}, {X: dc.Max.X, Y: dc.Min.Y},
		{X: dc.Max.X, Y: dc.Max.Y}, {X: dc.Min.X, Y: dc.Max.Y},
	})
	capStyle := textStyle(captionFontSize, pal.caption)
	margin := 0.2 * vg.Inch
	// The caption is measured in Liberation Sans; a viewer without it
	// draws the fallback (DejaVu Sans is about 12 % wider), so the lines
	// are wrapped with that much room to spare and are never cut.
	capLines := wrap(fleet.Caution, capStyle, (cfg.width-2*margin)/fallbackWidthFactor)
	capHeight := vg.Length(len(capLines))*capStyle.Height("Mg")*1.25 + margin
	// The legend is as wide as its longest label set in the fallback
	// font, and at least its share of the width.
	lgStyle := textStyle(bodyFontSize-1, pal.text)
	var labelW vg.Length
	for _, e := range legend {
		labelW = max(labelW, lgStyle.Width(e.label))
	}
	legendW := max(cfg.width*legendWidthFraction, labelW*fallbackWidthFactor+legendThumbnailWidth+3*vg.Points(4)+margin)
	// The title is centred over the plot: smaller type when it would
	// reach beyond it in the fallback font.
	for plotW := cfg.width - legendW - 0.15*vg.Inch; p.Title.TextStyle.Font.Size > 7 &&
		p.Title.TextStyle.Width(p.Title.Text)*fallbackWidthFactor > plotW; {
		p.Title.TextStyle.Font.Size -= 0.5
	}

	// A little room on the left: the rotated axis label, set in a
	// fallback font, stands out of its measured box.
	plotArea := draw.Crop(dc, 0.06*vg.Inch, -legendW-0.15*vg.Inch, capHeight, 0)
	p.Draw(plotArea)

	lg := plot.NewLegend()
	restyle(&lg.TextStyle, bodyFontSize-1, pal.text)
	lg.Padding = vg.Points(4)
	lg.Top, lg.Left = true, true
	lg.ThumbnailWidth = legendThumbnailWidth
	lg.YOffs = -0.5 * vg.Inch
	for _, e := range legend {
		lg.Add(e.label, e.thumb)
	}
	legendArea := draw.Crop(dc, cfg.width-legendW, -margin, capHeight, 0)
	lg.Draw(legendArea)

	capStyle.XAlign, capStyle.YAlign = text.XLeft, text.YBottom
	// Written in reading order (the first line at the top), so that the
	// SVG's text reads as the sentence.
	lineH := capStyle.Height("Mg") * 1.25
	for i, line := range capLines {
		y := dc.Min.Y + margin/2 + vg.Length(len(capLines)-1-i)*lineH
		dc.FillText(capStyle, vg.Point{X: dc.Min.X + margin, Y: y}, line)
	}

	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return fmt.Errorf("chart: drawing the SVG: %w", err)
	}
	out := buf.Bytes()
	if !cfg.embedFonts {
		// Liberation Sans has the metrics of Arial, so a viewer without it
		// still places the text where it was measured.
		out = bytes.ReplaceAll(out, []byte("font-family:Liberation Sans;"), []byte(fontFallback))
	}
	if _, err := w.Write(out); err != nil {
		return fmt.Errorf("chart: writing the SVG: %w", err)
	}
	return nil
}

// fallbackWidthFactor is how much wider than Liberation Sans the widest
// usual fallback font sets the same text (DejaVu Sans, measured on the
// caution sentence: about 1.12), with room to spare.
const fallbackWidthFactor = 1.2

// fontFallback is the font-family of the chart's text when the fonts are
// not embedded.
const fontFallback = "font-family:'Liberation Sans',Arial,Helvetica,sans-serif;"

// segments returns the runs of points where the bound exists, as (Q, P)
// in Mvar and MW.
func segments(pts []limits.EnvelopePoint, mva float64, get func(limits.EnvelopePoint) limits.Bound) []plotter.XYs {
	var out []plotter.XYs
	var cur plotter.XYs
	for _, e := range pts {
		b := get(e)
		if !b.OK || math.IsNaN(b.V) || math.IsInf(b.V, 0) {
			if len(cur) >= 2 {
				out = append(out, cur)
			}
			cur = nil
			continue
		}
		cur = append(cur, plotter.XY{X: b.V * mva, Y: e.P * mva})
	}
	if len(cur) >= 2 {
		out = append(out, cur)
	}
	return out
}

// regionPolygon returns the outline of the continuous capability region:
// between q_min and q_max, from p_min (when known) to the top of the
// envelope, where both bounds exist.
func regionPolygon(pts []limits.EnvelopePoint, mva float64, cfg config) plotter.XYs {
	pMin := 0.0
	if cfg.hasPrimeMover && cfg.pMinMW > 0 {
		pMin = cfg.pMinMW / mva
	}
	type row struct{ p, lo, hi float64 }
	var rows []row
	for i, e := range pts {
		if !e.QMax.OK || !e.QMin.OK || e.QMin.V > e.QMax.V {
			continue
		}
		if e.P < pMin {
			continue
		}
		if e.P > pMin && i > 0 && len(rows) == 0 {
			prev := pts[i-1]
			if prev.P < pMin && prev.QMax.OK && prev.QMin.OK {
				t := (pMin - prev.P) / (e.P - prev.P)
				rows = append(rows, row{pMin, lerp(prev.QMin.V, e.QMin.V, t), lerp(prev.QMax.V, e.QMax.V, t)})
			}
		}
		rows = append(rows, row{e.P, e.QMin.V, e.QMax.V})
	}
	if len(rows) < 2 {
		return nil
	}
	xys := make(plotter.XYs, 0, 2*len(rows))
	for _, r := range rows {
		xys = append(xys, plotter.XY{X: r.lo * mva, Y: r.p * mva})
	}
	for i := len(rows) - 1; i >= 0; i-- {
		xys = append(xys, plotter.XY{X: rows[i].hi * mva, Y: rows[i].p * mva})
	}
	return xys
}

func lerp(a, b, t float64) float64 { return a + t*(b-a) }

// wrap breaks s into lines no wider than width in style st.
func wrap(s string, st text.Style, width vg.Length) []string {
	var lines []string
	var cur string
	for _, word := range strings.Fields(s) {
		next := word
		if cur != "" {
			next = cur + " " + word
		}
		if cur != "" && st.Width(next) > width {
			lines = append(lines, cur)
			next = word
		}
		cur = next
	}
	if cur != "" {
		lines = append(lines, cur)
	}
	return lines
}

// ticks marks an axis every 1, 2 or 5 times a power of ten, aiming at
// about target labelled marks, with an unlabelled mark between each.
type ticks struct{ target int }

// Ticks implements plot.Ticker.
func (t ticks) Ticks(lo, hi float64) []plot.Tick {
	if !(hi > lo) || math.IsInf(hi-lo, 0) {
		return nil
	}
	raw := (hi - lo) / float64(t.target)
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step := mag
	for _, m := range []float64{1, 2, 5, 10} {
		if m*mag >= raw {
			step = m * mag
			break
		}
	}
	var out []plot.Tick
	half := step / 2
	for i := math.Ceil(lo / half); i*half <= hi && len(out) < 1000; i++ {
		v := i * half
		if math.Abs(v) < half*1e-9 {
			v = 0
		}
		label := ""
		if math.Mod(i, 2) == 0 {
			// As many decimals as the step needs: i*half carries the
			// rounding error of the product (1.2000000000000002).
			label = strconv.FormatFloat(v, 'f', max(0, -int(math.Floor(math.Log10(step)+1e-9))), 64)
		}
		out = append(out, plot.Tick{Value: v, Label: label})
	}
	return out
}
