package web

import (
	"fmt"
	"math"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

func TestNiceTicks(t *testing.T) {
	for _, tc := range []struct{ lo, hi float64 }{{0, 1}, {-12, 230}, {-5, 10}, {0.003, 0.004}, {-1500, -20}} {
		got, a, b := niceTicks(tc.lo, tc.hi, 4)
		if a > tc.lo || b < tc.hi {
			t.Errorf("niceTicks(%g, %g): range [%g, %g] does not cover it", tc.lo, tc.hi, a, b)
		}
		step := got[1] - got[0]
		m := step / math.Pow(10, math.Floor(math.Log10(step)))
		if math.Abs(m-1) > 1e-9 && math.Abs(m-2) > 1e-9 && math.Abs(m-5) > 1e-9 {
			t.Errorf("niceTicks(%g, %g): step %g is not 1, 2 or 5 times a power of ten", tc.lo, tc.hi, step)
		}
		if len(got) < 3 || len(got) > 9 {
			t.Errorf("niceTicks(%g, %g): %d ticks %v", tc.lo, tc.hi, len(got), got)
		}
	}
}

// The trend's lines break where a step has no sample, and each point
// lies at its step's middle on a six-hour axis ending at the latest step.
func TestTrendSVG(t *testing.T) {
	if got := string(trendSVG(nil, 100, 0.05)); !strings.Contains(got, "No trend yet") {
		t.Errorf("empty trend: %s", got)
	}
	t0 := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	nan := math.NaN()
	pts := []ingest.TrendPoint{
		{Time: t0, UpPU: 0.5, DownPU: 0.2, Margin: 0.1},
		{Time: t0.Add(time.Minute), UpPU: 0.4, DownPU: 0.3, Margin: 0.05},
		{Time: t0.Add(2 * time.Minute), UpPU: nan, DownPU: nan, Margin: nan},
		{Time: t0.Add(3 * time.Minute), UpPU: 0.6, DownPU: 0.1, Margin: 0.2},
	}
	svg := string(trendSVG(pts, 100, 0.05))
	path := regexp.MustCompile(`class="gv-trend-margin" d="([^"]*)"`).FindStringSubmatch(svg)
	if path == nil {
		t.Fatalf("no margin line in %s", svg)
	}
	if n := strings.Count(path[1], "M"); n != 2 {
		t.Errorf("margin line %q: %d pieces, want 2 (broken at the gap)", path[1], n)
	}
	// The latest point: half a step before the axis' right end.
	plotW := trendW - trendLeft - trendRight
	wantX := trendLeft + plotW*(1-0.5/float64(ingest.TrendPoints))
	var x, y float64
	last := path[1][strings.LastIndex(path[1], "M"):]
	if _, err := fmtSscan(last, &x, &y); err != nil {
		t.Fatalf("parsing %q: %v", last, err)
	}
	if math.Abs(x-wantX) > 0.1 {
		t.Errorf("latest point at x = %.1f, want %.1f", x, wantX)
	}
	// The lowest margin, 5 %, one minute before the latest step's start
	// is two steps before the latest.
	if !strings.Contains(svg, "Lowest nearest margin in the window: <strong>5.0 %</strong>, 2 min 00 s before") {
		t.Errorf("no lowest margin sentence in %s", svg[strings.Index(svg, "</svg>"):])
	}
	if !strings.Contains(svg, "−6 h") || !strings.Contains(svg, "latest") || strings.Contains(svg, "NaN") {
		t.Errorf("axis labels or NaN: %s", svg)
	}
}

// fmtSscan reads "M<x> <y>" from s.
func fmtSscan(s string, x, y *float64) (int, error) { return fmt.Sscanf(s, "M%g %g", x, y) }
