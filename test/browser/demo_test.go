package browser

import (
	"bufio"
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// TestDemoPages runs `genvelope demo` (the service on its invented fleet
// with the simulator pushing a sample a second per unit) and checks the
// pages against that live traffic: every unit listed, a unit's chart and
// operating point drawn, its numbers changing in place, the drifting
// unit's alarm acknowledged from its page, a clean console. The demo runs
// its day fast (--speed 6 on a 10-minute day) so the drift comes soon.
func TestDemoPages(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test: skipped under -short")
	}
	chromium := needChromium(t)
	dir := artifacts(t)
	web := startDemo(t)

	tab, consoleErrors := browser(t, chromium)
	if err := chromedp.Do(tab, chromedp.Navigate(web+"/"), chromedp.WaitVisible(chromedp.CSS(`table.fleet tbody tr`))); err != nil {
		t.Fatalf("overview: %v", err)
	}
	// Every unit reports within a few seconds of the start.
	waitFor(t, tab, "every unit to report", `[...document.querySelectorAll("table.fleet tbody tr")].length >= 2 &&
		[...document.querySelectorAll("table.fleet tbody tr td:nth-child(4)")].every(td => td.dataset.v !== "")`)
	screenshot(t, tab, dir, "demo-overview.png")

	unit := eval[string](t, tab, `document.querySelector("table.fleet tbody tr").dataset.unit`)
	if _, err := chromedp.RunResponse(tab, chromedp.Click(chromedp.CSS(`table.fleet tbody tr:first-child a.unit-link`))); err != nil {
		t.Fatalf("opening the page of %s: %v", unit, err)
	}
	if err := chromedp.Do(tab, chromedp.WaitVisible(chromedp.CSS(`.chart svg path.gv-operating-point`))); err != nil {
		t.Fatalf("the chart of %s has no operating point: %v", unit, err)
	}
	read := `["p_mw", "q_mvar", "v_kv"].map(k => document.querySelector('[data-value="' + k + '"]').textContent).join(" ")`
	before := eval[string](t, tab, read)
	eval[bool](t, tab, `(window.__sameDocument = true)`)
	waitFor(t, tab, "the numbers to change with the simulator's samples", read+` !== `+jsString(before))
	if !eval[bool](t, tab, `window.__sameDocument === true`) {
		t.Error("the page reloaded instead of updating in place")
	}
	screenshot(t, tab, dir, "demo-unit.png")

	// The scenario drifts vessa-2 onto its underexcited limit early in the
	// day: wait for its alarm on its page and acknowledge it there.
	if err := chromedp.Do(tab, chromedp.Navigate(web+"/units/vessa-2"), chromedp.WaitVisible(chromedp.CSS(`.chart svg`))); err != nil {
		t.Fatalf("the page of vessa-2: %v", err)
	}
	waitFor(t, tab, "vessa-2's drift to raise an alarm", `!!document.querySelector("button[data-ack]")`)
	kind := eval[string](t, tab, `document.querySelector("button[data-ack]").dataset.ack`)
	// Nobody is signed in: the operator gives a name, which the journal records.
	if err := chromedp.Do(tab, chromedp.SendKeys(chromedp.ID("operator"), "T. Quarrie"), chromedp.Click(chromedp.CSS(`button[data-ack="`+kind+`"]`))); err != nil {
		t.Fatalf("acknowledging vessa-2's %s alarm: %v", kind, err)
	}
	waitFor(t, tab, "vessa-2's "+kind+" alarm to show acknowledged", `(() => {
		const s = document.querySelector('[data-alarm="`+kind+`"] [data-alarm-state]');
		return !!s && !s.textContent.includes("not acknowledged") && s.textContent.includes("acknowledged"); })()`)
	screenshot(t, tab, dir, "demo-acknowledged.png")
	for _, e := range consoleErrors() {
		t.Errorf("browser console: %s", e)
	}
}

// jsString quotes s as a JavaScript string literal.
func jsString(s string) string {
	return `"` + strings.NewReplacer(`\`, `\\`, `"`, `\"`, "\n", `\n`).Replace(s) + `"`
}

// startDemo builds genvelope, runs its demo on loopback ports and returns
// the base URL of its web pages. The demo is stopped when the test ends.
func startDemo(t *testing.T) string {
	t.Helper()
	root, err := filepath.Abs(filepath.Join("..", ".."))
	if err != nil {
		t.Fatal(err)
	}
	bin := filepath.Join(t.TempDir(), "genvelope")
	ctx, cancel := context.WithTimeout(t.Context(), 10*time.Minute)
	defer cancel()
	build := exec.CommandContext(ctx, "go", "build", "-o", bin, "./cmd/genvelope")
	build.Dir = root
	if out, err := build.CombinedOutput(); err != nil {
		t.Fatalf("go build ./cmd/genvelope: %v\n%s", err, out)
	}
	if out, _ := exec.CommandContext(ctx, bin, "help").CombinedOutput(); !strings.Contains(string(out), "demo") {
		t.Skip("this genvelope has no demo command")
	}

	cmd := exec.Command(bin, "demo", "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0", "--state", "",
		"--speed", "6", "--day", "10m")
	logPath := filepath.Join(t.TempDir(), "demo.log")
	logFile, err := os.Create(logPath)
	if err != nil {
		t.Fatal(err)
	}
	defer logFile.Close() // the child has its own copy
	cmd.Stderr = logFile
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatalf("starting the demo: %v", err)
	}
	done := make(chan error, 1)
	urls := make(chan string, 1)
	go func() {
		// Read to the end, so that the demo never blocks on its output.
		sc := bufio.NewScanner(stdout)
		for sc.Scan() {
			if f := strings.Fields(sc.Text()); len(f) >= 3 && f[0] == "web" && f[1] == "pages" {
				select {
				case urls <- strings.TrimSuffix(f[2], "/"):
				default:
				}
			}
		}
		done <- cmd.Wait()
	}()
	t.Cleanup(func() {
		cmd.Process.Signal(syscall.SIGINT)
		select {
		case <-done:
		case <-time.After(waitLong):
			t.Errorf("the demo did not stop within %s of SIGINT", waitLong)
			cmd.Process.Kill()
			<-done
		}
		if t.Failed() {
			if b, err := os.ReadFile(logPath); err == nil {
				t.Logf("demo log:\n%s", b)
			}
		}
	})
	select {
	case u := <-urls:
		t.Logf("demo at %s", u)
		return u
	case err := <-done:
		t.Fatalf("the demo ended before printing its address: %v", err)
	case <-time.After(waitLong):
		t.Fatalf("the demo printed no address within %s", waitLong)
	}
	return ""
}
