package browser

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/server"
)

// exampleFleet is the fleet file the service ships as its example.
const exampleFleet = "../../deploy/examples/fleet.yaml"

// waitLong bounds every wait: nothing here is about speed, only that
// things happen.
const waitLong = 60 * time.Second

// The browser window: a control-room screen.
const (
	viewportWidth  = 1680
	viewportHeight = 1050
)

// needChromium returns the path of Debian's Chromium. Missing, it skips
// the test with how to install it, or fails it when CI=true.
func needChromium(t *testing.T) string {
	t.Helper()
	p, err := exec.LookPath("chromium")
	if err == nil {
		return p
	}
	msg := "chromium not found on PATH: install it with `apt-get install chromium`"
	if os.Getenv("CI") == "true" {
		t.Fatalf("%s (CI=true: outside programs are required)", msg)
	}
	t.Skip(msg)
	return ""
}

// artifacts returns the directory for screenshots.
func artifacts(t *testing.T) string {
	t.Helper()
	dir := os.Getenv("GENVELOPE_ARTIFACTS")
	if dir == "" {
		dir = t.TempDir()
	} else if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshots in %s", dir)
	return dir
}

// service is an in-process genvelope on loopback ports with a gRPC client.
type service struct {
	srv  *server.Server
	tel  pb.TelemetryServiceClient
	base string
}

func startService(t *testing.T) *service {
	t.Helper()
	return startServiceFleet(t, exampleFleet)
}

// startServiceFleet is startService on the fleet file at path.
func startServiceFleet(t *testing.T, path string) *service {
	t.Helper()
	srv, err := server.New(server.Config{
		FleetPath: path, GRPCListen: "127.0.0.1:0", HTTPListen: "127.0.0.1:0",
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil)),
	})
	if err != nil {
		t.Fatalf("server.New: %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- srv.Run(ctx) }()
	conn, err := grpc.NewClient(srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		cancel()
		t.Fatalf("grpc client: %v", err)
	}
	t.Cleanup(func() {
		conn.Close()
		cancel()
		select {
		case err := <-done:
			if err != nil {
				t.Errorf("Run: %v", err)
			}
		case <-time.After(waitLong):
			t.Errorf("server did not stop within %s", waitLong)
		}
	})
	s := &service{srv: srv, tel: pb.NewTelemetryServiceClient(conn), base: "http://" + srv.HTTPAddr()}
	deadline := time.Now().Add(waitLong)
	for {
		resp, err := http.Get(s.base + "/readyz")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return s
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("server not ready within %s: %v", waitLong, err)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// sample is one operating point of one unit.
type sample struct {
	unit          string
	at            time.Time
	pMW, qMvar, v float64
	coolant       float64 // 0: none
}

func (s *service) push(t *testing.T, smps ...sample) {
	t.Helper()
	req := &pb.PushRequest{Sequence: 1}
	for _, x := range smps {
		p := &pb.Sample{UnitId: x.unit, Time: timestamppb.New(x.at), PMw: x.pMW, QMvar: x.qMvar, VKv: x.v}
		if x.coolant != 0 {
			c := x.coolant
			p.Coolant = &c
		}
		req.Samples = append(req.Samples, p)
	}
	ctx, cancel := context.WithTimeout(t.Context(), waitLong)
	defer cancel()
	resp, err := s.tel.Push(ctx, req)
	if err != nil {
		t.Fatalf("Push: %v", err)
	}
	if int(resp.Accepted) != len(smps) {
		t.Fatalf("Push: %d of %d accepted: %v", resp.Accepted, len(smps), resp.Rejected)
	}
}

// browser starts Chromium, headless, with a fresh profile, and returns a
// tab's context and the console messages that are errors, read until the
// test ends.
func browser(t *testing.T, path string, extra ...chromedp.ExecAllocatorOption) (context.Context, func() []string) {
	t.Helper()
	return browserSized(t, path, viewportWidth, viewportHeight, extra...)
}

// browserSized is browser with a window of w × h pixels.
func browserSized(t *testing.T, path string, w, h int, extra ...chromedp.ExecAllocatorOption) (context.Context, func() []string) {
	t.Helper()
	opts := append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(path),
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.UserDataDir(t.TempDir()),
		chromedp.Flag("disable-quic", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.WindowSize(w, h),
	)
	opts = append(opts, extra...)
	ctx, cancel := context.WithTimeout(t.Context(), 3*waitLong)
	t.Cleanup(cancel)
	allocCtx, cancelAlloc := chromedp.NewExecAllocator(ctx, opts...)
	t.Cleanup(cancelAlloc)
	tab, cancelTab := chromedp.NewContext(allocCtx)
	t.Cleanup(cancelTab)
	if err := chromedp.Do(tab, chromedp.EmulateViewport(int64(w), int64(h))); err != nil { // starts the browser
		t.Fatalf("starting chromium: %v", err)
	}
	msgs := chromedp.Console(tab)
	errc := make(chan []string, 1)
	consoleCtx, stopConsole := context.WithCancel(tab)
	go func() {
		var errs []string
		for m, err := range msgs {
			if err != nil || consoleCtx.Err() != nil {
				break
			}
			if m.Type == chromedp.ConsoleError || m.IsException() {
				errs = append(errs, fmt.Sprintf("%s (%s:%d)", m, m.URL, m.Line))
			}
		}
		errc <- errs
	}()
	var got []string
	collected := false
	return tab, func() []string {
		if !collected {
			stopConsole()
			cancelTab() // ends the subscription
			got, collected = <-errc, true
		}
		return got
	}
}

// screenshot saves the whole page as PNG. The viewport is stretched to
// the page's height first, so that the caution footer, which sticks to
// the bottom of the viewport, is drawn at the end and not over the page.
func screenshot(t *testing.T, ctx context.Context, dir, name string) {
	t.Helper()
	w := eval[int](t, ctx, `window.innerWidth`)
	vh := eval[int](t, ctx, `window.innerHeight`)
	h := eval[int](t, ctx, `Math.ceil(document.documentElement.scrollHeight)`)
	if err := chromedp.Do(ctx, chromedp.EmulateViewport(int64(w), int64(max(h, vh)))); err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if rerr := chromedp.Do(ctx, chromedp.EmulateViewport(int64(w), int64(vh))); err == nil {
		err = rerr
	}
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	writeFile(t, filepath.Join(dir, name), png)
}

// writeFile saves a screenshot and logs where.
func writeFile(t *testing.T, p string, png []byte) {
	t.Helper()
	if err := os.WriteFile(p, png, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("wrote %s", p)
}

// eval runs a JavaScript expression in the page and returns its value.
func eval[T any](t *testing.T, ctx context.Context, expr string) T {
	t.Helper()
	v, err := chromedp.Run(ctx, chromedp.Evaluate[T](expr))
	if err != nil {
		t.Fatalf("evaluating %s: %v", expr, err)
	}
	return v
}

// waitFor waits until a JavaScript expression is true in the page.
func waitFor(t *testing.T, ctx context.Context, what, expr string) {
	t.Helper()
	if _, err := chromedp.Run(ctx, chromedp.Poll[bool](expr, chromedp.WithPollingTimeout(waitLong), chromedp.WithPollingInterval(100*time.Millisecond))); err != nil {
		t.Fatalf("waiting for %s (%s): %v", what, expr, err)
	}
}

func TestOperatorPages(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test: skipped under -short")
	}
	chromium := needChromium(t)
	dir := artifacts(t)
	svc := startService(t)

	// harrowmere-1 beyond its field current limit for longer than the
	// on-delay: q_max is about 226 Mvar at 300 MW, 20.4 kV and full
	// hydrogen pressure, so at 240 Mvar the field alarm is critical. The
	// other two units run well inside their envelopes.
	now := time.Now()
	var smps []sample
	for i, dt := range []time.Duration{-40, -30, -20, -12, -6, -2} {
		smps = append(smps, sample{"harrowmere-1", now.Add(dt * time.Second), 296 + float64(i), 232 + 1.5*float64(i), 20.4, 414})
	}
	smps = append(smps,
		sample{"larchwater-2", now.Add(-2 * time.Second), 72, 14, 13.85, 0},
		sample{"brindle-gt3", now.Add(-2 * time.Second), 104, 22, 15.1, 10},
	)
	svc.push(t, smps...)
	store := svc.srv.Store()
	if l := store.Unit("harrowmere-1").View().Alarms[alarm.Field].Level; l != alarm.Critical {
		t.Fatalf("setup: the field alarm of harrowmere-1 is %s, want critical", l)
	}

	tab, consoleErrors := browser(t, chromium)

	// The overview: every unit, worst first, the caution, live updates.
	if err := chromedp.Do(tab, chromedp.Navigate(svc.base+"/"), chromedp.WaitVisible(chromedp.CSS(`table.fleet tbody tr`))); err != nil {
		t.Fatalf("overview: %v", err)
	}
	if got := eval[[]string](t, tab, `[...document.querySelectorAll("table.fleet tbody tr")].map(r => r.dataset.unit)`); len(got) != 3 || got[0] != "harrowmere-1" {
		t.Errorf("overview rows %v: want three, harrowmere-1 (critical) first", got)
	}
	if got := eval[string](t, tab, `document.querySelector("footer.caution").textContent`); !strings.Contains(got, fleet.Caution) {
		t.Errorf("overview: caution %q", got)
	}
	waitFor(t, tab, "the overview's live refresh", `document.querySelector("[data-live-status]").classList.contains("is-live")`)
	screenshot(t, tab, dir, "overview.png")
	// The console is watched: this error must be seen (and is then let go).
	eval[bool](t, tab, `(console.error("`+consoleProbe+`"), true)`)
	// Sorting by unit name puts Brindle Flats first; again reverses it.
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS(`table.fleet thead th:nth-child(2) button`))); err != nil {
		t.Fatal(err)
	}
	if got := eval[string](t, tab, `document.querySelector("table.fleet tbody tr").dataset.unit`); got != "brindle-gt3" {
		t.Errorf("sorted by unit: first row %s, want brindle-gt3", got)
	}
	if got := eval[string](t, tab, `document.querySelector("table.fleet thead th:nth-child(2)").getAttribute("aria-sort")`); got != "ascending" {
		t.Errorf("sorted by unit: aria-sort %q", got)
	}
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS(`table.fleet thead th:nth-child(2) button`))); err != nil {
		t.Fatal(err)
	}
	if got := eval[string](t, tab, `document.querySelector("table.fleet tbody tr").dataset.unit`); got != "larchwater-2" {
		t.Errorf("sorted by unit, descending: first row %s, want larchwater-2", got)
	}
	screenshot(t, tab, dir, "overview-sorted.png")

	// The unit page, reached from the overview.
	if _, err := chromedp.RunResponse(tab, chromedp.Click(chromedp.CSS(`tr[data-unit="harrowmere-1"] a.unit-link`))); err != nil {
		t.Fatalf("opening the unit page: %v", err)
	}
	if err := chromedp.Do(tab, chromedp.WaitVisible(chromedp.CSS(`.chart svg`))); err != nil {
		t.Fatalf("unit page: %v", err)
	}
	if got := eval[string](t, tab, `location.pathname`); got != "/units/harrowmere-1" {
		t.Fatalf("unit page at %s", got)
	}
	// The chart and the operating point are drawn: the ring has a size
	// and lies inside the chart.
	drawn := `(() => {
		const svg = document.querySelector(".chart svg");
		const op = svg && svg.querySelector("path.gv-operating-point");
		const tr = svg && svg.querySelector("path.gv-operating-trail");
		if (!op || !tr) return false;
		const a = svg.getBoundingClientRect(), b = op.getBoundingClientRect();
		return b.width > 4 && b.height > 4 && b.left >= a.left && b.right <= a.right && b.top >= a.top && b.bottom <= a.bottom &&
			svg.querySelectorAll("path").length > 20 && svg.textContent.includes("field current limit");
	})()`
	if !eval[bool](t, tab, drawn) {
		t.Error("the chart, its operating point or its trail is not drawn")
	}
	if c := clipped(t, tab, `.tile, .status-strip, .panel`); c != "" {
		t.Errorf("unit page at %d × %d: clipped: %s", viewportWidth, viewportHeight, c)
	}
	if got := eval[string](t, tab, `document.querySelector('[data-value="p_mw"]').textContent`); got != "301.0" {
		t.Errorf("P shows %q, want 301.0", got)
	}
	waitFor(t, tab, "the unit page's live refresh", `document.querySelector("[data-live-status]").classList.contains("is-live")`)
	opBefore := eval[string](t, tab, `document.querySelector(".chart svg path.gv-operating-point").getAttribute("d")`)

	// Live: a new sample changes the numbers and moves the point, without
	// a reload.
	eval[bool](t, tab, `(window.__sameDocument = true)`)
	svc.push(t, sample{"harrowmere-1", time.Now(), 311.5, 236, 20.45, 414})
	waitFor(t, tab, "P to show the new sample", `document.querySelector('[data-value="p_mw"]').textContent === "311.5"`)
	if got := eval[string](t, tab, `document.querySelector('[data-value="q_mvar"]').textContent`); got != "236.0" {
		t.Errorf("Q shows %q after the new sample, want 236.0", got)
	}
	waitFor(t, tab, "the operating point to move", fmt.Sprintf(`document.querySelector(".chart svg path.gv-operating-point").getAttribute("d") !== %q`, opBefore))
	if !eval[bool](t, tab, `window.__sameDocument === true`) {
		t.Error("the page reloaded instead of updating in place")
	}

	// Acknowledge the critical field alarm.
	if got := eval[string](t, tab, `document.querySelector('[data-alarm="field"] [data-alarm-state]').textContent`); !strings.Contains(got, "not acknowledged") {
		t.Errorf("field alarm state %q before acknowledging", got)
	}
	screenshot(t, tab, dir, "unit-alarm.png")
	if err := chromedp.Do(tab,
		chromedp.SendKeys(chromedp.ID("operator"), "R. Amsel"),
		chromedp.Click(chromedp.CSS(`button[data-ack="field"]`)),
	); err != nil {
		t.Fatalf("acknowledging: %v", err)
	}
	waitFor(t, tab, "the alarm to show acknowledged",
		`(() => { const s = document.querySelector('[data-alarm="field"] [data-alarm-state]');
			return !!s && s.textContent.includes("acknowledged") && !s.textContent.includes("not acknowledged") && !document.querySelector('button[data-ack="field"]'); })()`)
	if got := eval[string](t, tab, `document.querySelector("[data-action-result]").textContent`); !strings.Contains(got, "acknowledged by R. Amsel") {
		t.Errorf("action result %q", got)
	}
	if !store.Unit("harrowmere-1").View().Alarms[alarm.Field].Acknowledged {
		t.Error("the page shows the alarm acknowledged, the store does not")
	}
	screenshot(t, tab, dir, "unit-acknowledged.png")

	// Unknown unit.
	resp, err := chromedp.Run(tab, chromedp.NavigateResponse(svc.base+"/units/nowhere-9"))
	if err != nil {
		t.Fatal(err)
	}
	if resp.Status != http.StatusNotFound {
		t.Errorf("unknown unit: HTTP %d, want 404", resp.Status)
	}
	screenshot(t, tab, dir, "not-found.png")

	// The 404 itself is reported by the browser as a failed load; every
	// other console error is a fault of the pages.
	probed := false
	for _, e := range consoleErrors() {
		switch {
		case strings.Contains(e, consoleProbe):
			probed = true
		case strings.Contains(e, "/units/nowhere-9") || strings.Contains(e, "status of 404"):
		default:
			t.Errorf("browser console: %s", e)
		}
	}
	if !probed {
		t.Error("the console watch missed the probe error: console errors would go unseen")
	}
}

// consoleProbe is an error the test writes to the console itself, to show
// that the console is watched.
const consoleProbe = "genvelope-console-probe"
