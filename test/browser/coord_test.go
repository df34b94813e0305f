package browser

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"github.com/genvelope/genvelope/service/coord"
	"github.com/genvelope/genvelope/service/fleet"
)

// TestCoordinationReport opens the coordination study of the example
// fleet in Chromium: the summary table and, for every unit, the three
// P-Q charts, the R-X, time-current and V/Hz charts, the inputs and the
// caution; no console errors; a screenshot for the record.
func TestCoordinationReport(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test: skipped under -short")
	}
	path := needChromium(t)
	data, err := os.ReadFile(exampleFleet)
	if err != nil {
		t.Fatal(err)
	}
	f, ds := fleet.Parse(exampleFleet, data)
	if ds.HasErrors() {
		t.Fatalf("example fleet: %s", ds)
	}
	rep := coord.Study(f)
	var b bytes.Buffer
	if err := rep.WriteHTML(&b, coord.Source{FleetFile: exampleFleet, Data: data, At: time.Date(2026, 12, 2, 5, 0, 0, 0, time.UTC)}); err != nil {
		t.Fatal(err)
	}
	for _, ref := range []string{`src="http`, `href="http`, `url(http`, `@import`} {
		if strings.Contains(b.String(), ref) {
			t.Errorf("the report loads %s...; it must be self-contained", ref)
		}
	}
	file := filepath.Join(t.TempDir(), "coordination.html")
	if err := os.WriteFile(file, b.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
	ctx, consoleErrors := browser(t, path)
	if err := chromedp.Do(ctx, chromedp.Navigate("file://"+file)); err != nil {
		t.Fatal(err)
	}
	waitFor(t, ctx, "the report", `document.querySelector('#summary') !== null`)
	n := len(rep.Units)
	if got := eval[int](t, ctx, `document.querySelectorAll('#summary tr').length - 1`); got != n {
		t.Errorf("summary rows %d, want %d units", got, n)
	}
	for _, c := range []struct {
		sel  string
		want int
	}{
		{".chart-pq svg.gv-coord-chart", 3 * n},
		{".chart-rx svg.gv-coord-chart", n},
		{".chart-time svg.gv-coord-chart", n},
		{".chart-vhz svg.gv-coord-chart", n},
		{"section.unit table.inputs", n},
		{"table.checks tr", 9 * n},
	} {
		if got := eval[int](t, ctx, `document.querySelectorAll('`+c.sel+`').length`); got != c.want {
			t.Errorf("%s: %d, want %d", c.sel, got, c.want)
		}
	}
	// Every chart is drawn: it has a size on the page.
	if got := eval[int](t, ctx, `[...document.querySelectorAll('svg.gv-coord-chart')].filter(s => s.getBoundingClientRect().width < 100).length`); got != 0 {
		t.Errorf("%d chart(s) drawn without a size", got)
	}
	if !strings.Contains(eval[string](t, ctx, `document.body.innerText`), fleet.Caution) {
		t.Error("the caution is missing")
	}
	screenshot(t, ctx, artifacts(t), "coordination-report.png")
	if errs := consoleErrors(); len(errs) > 0 {
		t.Errorf("console errors:\n%s", strings.Join(errs, "\n"))
	}
}
