package chart

import (
	"bytes"
	"fmt"
	"image/color"
)

// The class names Mark gives the chart's operating point and trail, for a
// web page's stylesheet and scripts.
const (
	ClassOperatingPoint = "gv-operating-point"
	ClassOperatingTrail = "gv-operating-trail"
)

// Mark returns svg, a chart written by Capability, with the class
// ClassOperatingPoint on the operating point's ring and ClassOperatingTrail
// on the trail's line, so that a page embedding the chart can style and
// find them. The plot is drawn before its legend, so the first path in
// each mark's colour is the mark itself; the legend's samples stay as
// they are. A chart without the marks comes back unchanged.
func Mark(svg []byte) []byte {
	pal := defaultPalette()
	out := tagFirstPath(svg, strokeStyle(pal.point), ClassOperatingPoint)
	return tagFirstPath(out, strokeStyle(pal.trail), ClassOperatingTrail)
}

// strokeStyle is how the SVG canvas writes a stroke of colour c.
func strokeStyle(c color.Color) []byte {
	r, g, b, _ := c.RGBA()
	return fmt.Appendf(nil, "stroke:#%02X%02X%02X", r>>8, g>>8, b>>8)
}

// tagFirstPath adds class to the first <path> element whose attributes
// contain style, and returns the result (svg itself when none does).
func tagFirstPath(svg, style []byte, class string) []byte {
	open := []byte("<path ")
	for i := 0; ; {
		j := bytes.Index(svg[i:], open)
		if j < 0 {
			return svg
		}
		start := i + j
		end := bytes.Index(svg[start:], []byte(">"))
		if end < 0 {
			return svg
		}
		end += start
		if bytes.Contains(svg[start:end], style) {
			var b bytes.Buffer
			b.Grow(len(svg) + len(class) + 9)
			b.Write(svg[:start+len(open)])
			fmt.Fprintf(&b, "class=%q ", class)
			b.Write(svg[start+len(open):])
			return b.Bytes()
		}
		i = end
	}
}
