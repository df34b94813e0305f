package browser

import (
	"context"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/cdproto/emulation"
	"github.com/chromedp/chromedp"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/alarm"
)

// A laptop screen, the smallest the pages are made for.
const (
	laptopWidth  = 1366
	laptopHeight = 768
)

// pushRaw sends samples as they are and fails unless all are accepted.
func (s *service) pushRaw(t *testing.T, smps ...*pb.Sample) {
	t.Helper()
	ctx, cancel := context.WithTimeout(t.Context(), waitLong)
	defer cancel()
	resp, err := s.tel.Push(ctx, &pb.PushRequest{Sequence: 1, Samples: smps})
	if err != nil {
		t.Fatalf("Push: %v", err)
	}
	if int(resp.Accepted) != len(smps) {
		t.Fatalf("Push: %d of %d accepted: %v", resp.Accepted, len(smps), resp.Rejected)
	}
}

// viewportShot saves what the screen shows, without scrolling: what is
// above the fold.
func viewportShot(t *testing.T, ctx context.Context, dir, name string) {
	t.Helper()
	png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	writeFile(t, filepath.Join(dir, name), png)
}

// clipped returns, for the elements matching sel, a description of each
// whose box reaches outside the viewport's width, or whose scroll box
// hides content sideways; "" when none does.
func clipped(t *testing.T, ctx context.Context, sel string) string {
	t.Helper()
	return eval[string](t, ctx, fmt.Sprintf(`(() => {
		const vw = document.documentElement.clientWidth, out = [];
		for (const el of document.querySelectorAll(%q)) {
			const r = el.getBoundingClientRect();
			if (r.left < -0.5 || r.right > vw + 0.5) out.push(el.tagName + " " + (el.textContent || "").trim().slice(0, 30) + " [" + Math.round(r.left) + ", " + Math.round(r.right) + "]");
			if (el.scrollWidth > el.clientWidth + 1 && getComputedStyle(el).overflowX !== "visible") out.push(el.tagName + "." + el.className + " scrolls sideways: " + el.scrollWidth + " > " + el.clientWidth);
		}
		for (const el of document.querySelectorAll(".tile, table.fleet td, table.margins td")) {
			if (el.scrollWidth > el.clientWidth + 1) out.push(el.className + " " + (el.textContent || "").trim().slice(0, 30) + " overflows: " + el.scrollWidth + " > " + el.clientWidth);
		}
		if (document.documentElement.scrollWidth > vw + 1) out.push("the page scrolls sideways: " + document.documentElement.scrollWidth + " > " + vw);
		return out.join("; ");
	})()`, sel))
}

// TestLaptopScreen checks the pages at 1366 × 768: the overview shows
// every column unclipped, says why a unit is in alarm (V/Hz), that one
// has no data and that one's sample is questionable; a unit page has its
// chart's axes, its operating point and its footnote in view above the
// caution; the trend is drawn; printing leaves the controls out.
func TestLaptopScreen(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test: skipped under -short")
	}
	chromium := needChromium(t)
	dir := artifacts(t)
	svc := startService(t)

	// harrowmere-1 (20 kV, 50 Hz) at 1.045 pu and 49.5 Hz for 40 s:
	// v/f = 1.045 / 0.99 = 1.0556 pu, beyond the 1.05 pu continuous
	// limit, so its V/Hz alarm is critical after the 5 s on-delay; the
	// zone (B, a warning) is the lesser alarm. larchwater-2 reports one
	// QUESTIONABLE sample with a field current; brindle-gt3 reports
	// nothing.
	now := time.Now()
	hz, coolant := 49.5, 414.0
	var smps []*pb.Sample
	// Three hours of history first, one sample a minute, inside the
	// envelope: the unit page's trend has something to draw.
	for m := 180; m >= 1; m-- {
		q := 40 + 60*math.Sin(float64(m)/25)
		smps = append(smps, &pb.Sample{UnitId: "harrowmere-1", Time: timestamppb.New(now.Add(-time.Duration(m)*time.Minute - time.Minute)),
			PMw: 200 + float64(m%60), QMvar: q, VKv: 20.2, Coolant: &coolant})
	}
	for _, dt := range []time.Duration{-40, -30, -20, -12, -6, -2} {
		smps = append(smps, &pb.Sample{UnitId: "harrowmere-1", Time: timestamppb.New(now.Add(dt * time.Second)),
			PMw: 250, QMvar: 40, VKv: 20.9, FrequencyHz: &hz, Coolant: &coolant})
	}
	fieldA := 900.0
	smps = append(smps, &pb.Sample{UnitId: "larchwater-2", Time: timestamppb.New(now.Add(-2 * time.Second)),
		PMw: 72, QMvar: 14, VKv: 13.85, FieldA: &fieldA, Quality: pb.Quality_QUALITY_QUESTIONABLE})
	svc.pushRaw(t, smps...)
	v := svc.srv.Store().Unit("harrowmere-1").View()
	if l := v.Alarms[alarm.VoltsPerHertz].Level; l != alarm.Critical {
		t.Fatalf("setup: the V/Hz alarm of harrowmere-1 is %s, want critical", l)
	}
	if l := v.Alarms[alarm.VoltageFrequencyZone].Level; l > alarm.Warning {
		t.Fatalf("setup: the zone alarm of harrowmere-1 is %s, want at most warning", l)
	}

	tab, consoleErrors := browserSized(t, chromium, laptopWidth, laptopHeight)
	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/"), chromedp.WaitVisible(chromedp.CSS(`table.fleet tbody tr`))); err != nil {
		t.Fatalf("overview: %v", err)
	}
	if got := eval[[]int](t, tab, `[window.innerWidth, window.innerHeight]`); got[0] != laptopWidth || got[1] != laptopHeight {
		t.Fatalf("viewport %v, want %d × %d", got, laptopWidth, laptopHeight)
	}
	viewportShot(t, tab, dir, "laptop-overview.png")
	if c := clipped(t, tab, `table.fleet th, table.fleet td, .table-wrap, .summary li`); c != "" {
		t.Errorf("overview at %d × %d: clipped: %s", laptopWidth, laptopHeight, c)
	}
	heads := eval[[]string](t, tab, `[...document.querySelectorAll("table.fleet thead th")].map(th => th.textContent.replace(/\s+/g, " ").trim())`)
	for _, want := range []string{"Alarm", "Unit", "P", "Q", "V", "Headroom ↑", "Headroom ↓", "Nearest limit", "Alarm cause", "Data age"} {
		found := false
		for _, h := range heads {
			found = found || strings.HasPrefix(h, want)
		}
		if !found {
			t.Errorf("overview: no column %q in %q", want, heads)
		}
	}
	row := func(id, js string) string {
		return eval[string](t, tab, fmt.Sprintf(`(() => { const r = document.querySelector('tr[data-unit=%q]'); return r ? %s : "no row"; })()`, id, js))
	}
	if got := row("harrowmere-1", `r.querySelector("td.cause").dataset.cause + " | " + r.querySelector("td.cause").textContent`); !strings.HasPrefix(got, "volts_per_hertz | Volts per hertz") || !strings.Contains(got, "1.05 pu") {
		t.Errorf("harrowmere-1's cause: %q, want V/Hz and its sentence", got)
	}
	if got := row("brindle-gt3", `r.dataset.state + " | " + r.textContent.replace(/\s+/g, " ")`); !strings.HasPrefix(got, "no data | ") || !strings.Contains(got, "No data") || strings.Contains(got, "normal") {
		t.Errorf("brindle-gt3: %q, want no data", got)
	}
	if got := row("larchwater-2", `r.classList.contains("is-questionable") + " " + r.textContent`); !strings.HasPrefix(got, "true") || !strings.Contains(got, "questionable") {
		t.Errorf("larchwater-2: %q, want its questionable sample marked", got)
	}
	if got := eval[string](t, tab, `document.querySelector("table.fleet tbody tr").dataset.unit`); got != "harrowmere-1" {
		t.Errorf("first row %s, want harrowmere-1 (critical)", got)
	}
	screenshot(t, tab, dir, "laptop-overview-full.png")

	// The unit page: chart axes, operating point and footnote above the
	// caution, without scrolling.
	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/units/harrowmere-1"), chromedp.WaitVisible(chromedp.CSS(`.chart svg path.gv-operating-point`))); err != nil {
		t.Fatalf("unit page: %v", err)
	}
	viewportShot(t, tab, dir, "laptop-unit.png")
	if fold := aboveFold(t, tab); fold != "" {
		t.Errorf("harrowmere-1's page at %d × %d: %s", laptopWidth, laptopHeight, fold)
	}
	if c := clipped(t, tab, `.tile, .status-strip, .panel`); c != "" {
		t.Errorf("unit page: clipped: %s", c)
	}
	if got := eval[string](t, tab, `document.querySelector(".chart svg").textContent.replace(/\s+/g, " ")`); !strings.Contains(got, "licensed engineers decide how a machine is operated and protected.") {
		t.Errorf("the chart's footnote does not read whole: %q", got[max(0, len(got)-200):])
	}
	if !eval[bool](t, tab, `!!document.querySelector(".trend svg path.gv-trend-margin") && !!document.querySelector(".trend svg path.gv-trend-up")`) {
		t.Error("the trend's lines are not drawn")
	}
	screenshot(t, tab, dir, "laptop-unit-full.png")

	// The questionable unit: its field reading is shown as not used.

	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/units/larchwater-2"), chromedp.WaitVisible(chromedp.CSS(`.chart svg`))); err != nil {
		t.Fatalf("larchwater-2: %v", err)
	}
	if got := eval[string](t, tab, `document.querySelector('[data-value="field_measured_a"]').textContent`); !strings.Contains(got, "900 A") || !strings.Contains(got, "not used") {
		t.Errorf("larchwater-2's field current %q: want the reading marked not used", got)
	}
	screenshot(t, tab, dir, "laptop-questionable-full.png")
	if fold := aboveFold(t, tab); fold != "" {
		t.Errorf("larchwater-2's page at %d × %d: %s", laptopWidth, laptopHeight, fold)
	}
	if !eval[bool](t, tab, `document.querySelector(".chart svg").textContent.includes("QUESTIONABLE sample")`) {
		t.Error("larchwater-2's chart does not say its sample is questionable")
	}
	if !eval[bool](t, tab, `document.querySelector(".status-strip").textContent.includes("questionable")`) {
		t.Error("larchwater-2's status does not say the sample is questionable")
	}

	// The no-data unit's page.
	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/units/brindle-gt3"), chromedp.WaitVisible(chromedp.CSS(`.chart svg`))); err != nil {
		t.Fatalf("brindle-gt3: %v", err)
	}
	if got := eval[string](t, tab, `document.querySelector(".status-strip").dataset.state + " | " + document.querySelector(".status-strip").textContent`); !strings.HasPrefix(got, "no data | ") {
		t.Errorf("brindle-gt3's status %q, want no data", got)
	}
	viewportShot(t, tab, dir, "laptop-nodata.png")
	if fold := aboveFold(t, tab); fold != "" {
		t.Errorf("brindle-gt3's page at %d × %d: %s", laptopWidth, laptopHeight, fold)
	}

	// Printed: the unit page without its controls, the caution kept.
	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/units/harrowmere-1"), chromedp.WaitVisible(chromedp.CSS(`.chart svg`))); err != nil {
		t.Fatalf("unit page: %v", err)
	}
	if _, err := chromedp.Call(tab, emulation.SetEmulatedMedia, emulation.SetEmulatedMediaParams{Media: "print"}); err != nil {
		t.Fatalf("print media: %v", err)
	}
	hidden := eval[string](t, tab, `[...document.querySelectorAll(".alarm-actions, .operator, .live-status, .topnav")].filter(e => getComputedStyle(e).display !== "none").map(e => e.className).join(", ")`)
	if hidden != "" {
		t.Errorf("printed, these controls show: %s", hidden)
	}
	if got := eval[string](t, tab, `getComputedStyle(document.querySelector("footer.caution")).display + " " + document.querySelector("footer.caution").textContent`); strings.HasPrefix(got, "none") || !strings.Contains(got, "advises only") {
		t.Errorf("printed, the caution: %q", got)
	}
	screenshot(t, tab, dir, "laptop-unit-print.png")

	for _, e := range consoleErrors() {
		t.Errorf("browser console: %s", e)
	}
}

// aboveFold returns what of the unit page's chart (its box, its axes and
// labels, its footnote, the operating point when there is one) lies
// outside the chart or below the caution footer without scrolling; ""
// when all is in view.
func aboveFold(t *testing.T, ctx context.Context) string {
	t.Helper()
	return eval[string](t, ctx, `(() => {
		const out = [], fold = document.querySelector("footer.caution").getBoundingClientRect().top;
		// The drawing's own area: the viewBox as placed on the screen
		// (the element may be wider than the drawing it centres).
		const svgEl = document.querySelector(".chart svg"), vb = svgEl.viewBox.baseVal, m = svgEl.getScreenCTM();
		const p0 = new DOMPoint(vb.x, vb.y).matrixTransform(m), p1 = new DOMPoint(vb.x + vb.width, vb.y + vb.height).matrixTransform(m);
		const svg = {left: Math.min(p0.x, p1.x), right: Math.max(p0.x, p1.x), top: Math.min(p0.y, p1.y), bottom: Math.max(p0.y, p1.y)};
		if (svg.top < 0 || svg.bottom > fold) out.push("chart from " + Math.round(svg.top) + " to " + Math.round(svg.bottom) + ", fold at " + Math.round(fold));
		const opEl = document.querySelector(".chart svg path.gv-operating-point");
		if (opEl) {
			const op = opEl.getBoundingClientRect();
			if (op.top < 0 || op.bottom > fold || op.width < 3) out.push("operating point at " + Math.round(op.top));
		}
		for (const el of document.querySelectorAll(".chart svg text")) {
			const r = el.getBoundingClientRect();
			if (r.width > 0 && (r.left < svg.left - 0.5 || r.right > svg.right + 0.5 || r.bottom > svg.bottom + 0.5 || r.bottom > fold))
				out.push("text cut: " + el.textContent.slice(0, 40) + " [" + Math.round(r.left) + ", " + Math.round(r.right) + "] in [" + Math.round(svg.left) + ", " + Math.round(svg.right) + "]");
		}
		return out.join("; ");
	})()`)
}

// TestStaleOnPages: a unit whose telemetry stops turns stale on the
// overview and on its page while they stay open: its state says so in
// words, its numbers are greyed, its cause is the stale-telemetry alarm.
// The fleet is the example with a stale threshold of 2 s, so that the
// test waits seconds, not half a minute.
func TestStaleOnPages(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test: skipped under -short")
	}
	chromium := needChromium(t)
	dir := artifacts(t)
	example, err := os.ReadFile(exampleFleet)
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "fleet.yaml")
	fast := "alarms:\n  limits:\n    stale_telemetry: {warning: 2, critical: 600}\n"
	if err := os.WriteFile(path, append([]byte(fast), example...), 0o644); err != nil {
		t.Fatal(err)
	}
	svc := startServiceFleet(t, path)
	svc.pushRaw(t, &pb.Sample{UnitId: "larchwater-2", Time: timestamppb.New(time.Now()), PMw: 72, QMvar: 14, VKv: 13.85})

	tab, consoleErrors := browserSized(t, chromium, laptopWidth, laptopHeight)
	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/"), chromedp.WaitVisible(chromedp.CSS(`table.fleet tbody tr`))); err != nil {
		t.Fatalf("overview: %v", err)
	}
	waitFor(t, tab, "larchwater-2 to turn stale on the open overview", `(() => {
		const r = document.querySelector('tr[data-unit="larchwater-2"]');
		return !!r && r.dataset.state === "stale" && r.querySelector("td.cause").dataset.cause === "stale_telemetry"; })()`)
	got := eval[string](t, tab, `(() => { const r = document.querySelector('tr[data-unit="larchwater-2"]');
		return getComputedStyle(r.querySelector("td.val")).fontStyle + " | " + r.textContent.replace(/\s+/g, " "); })()`)
	if !strings.HasPrefix(got, "italic | ") || !strings.Contains(got, "stale") || !strings.Contains(got, "Telemetry stale") || !strings.Contains(got, "72.0") ||
		strings.Contains(got, "no sample for 0 s") {
		t.Errorf("stale row: %q, want greyed numbers kept, the word stale and the stale-telemetry cause", got)
	}
	viewportShot(t, tab, dir, "stale-overview.png")

	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/units/larchwater-2"), chromedp.WaitVisible(chromedp.CSS(`.chart svg`))); err != nil {
		t.Fatalf("unit page: %v", err)
	}
	if got := eval[string](t, tab, `document.querySelector(".status-strip").dataset.state + " " + document.querySelector(".tiles").className`); got != "stale tiles is-stale" {
		t.Errorf("stale unit page: %q", got)
	}
	viewportShot(t, tab, dir, "stale-unit.png")
	if got := eval[string](t, tab, `document.querySelector("table.thermal").textContent.replace(/\s+/g, " ")`); strings.Count(got, "unknown (stale)") != 2 || strings.Contains(got, "normal") {
		t.Errorf("stale unit's thermal state: %q, want unknown for both windings, never normal", got)
	}
	if got := eval[string](t, tab, `document.querySelector("table.margins").textContent.replace(/\s+/g, " ")`); strings.Contains(got, "normal") {
		t.Errorf("stale unit's margins say normal: %q", got)
	}
	screenshot(t, tab, dir, "stale-unit-full.png")
	for _, e := range consoleErrors() {
		t.Errorf("browser console: %s", e)
	}
}
