package browser

import (
	"context"
	"crypto/tls"
	"encoding/base64"
	"io"
	"log/slog"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/chromedp"
	"golang.org/x/crypto/bcrypt"

	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testpki"
)

// Signed in over TLS with basic auth: a viewer sees the unit and its
// alarm but no action; an operator of the unit's site acknowledges it,
// and the acknowledgement carries the operator's identity.
func TestSignedInRights(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test: skipped under -short")
	}
	chromium := needChromium(t)
	dir := artifacts(t)
	tmp := t.TempDir()
	ca := testpki.NewCA(t, "browser test CA")
	testpki.WriteLeaf(t, tmp, "server", ca.Server(t))
	users := map[string]string{"viewer-all": "view-pass", "op-harrowmere": "operate-pass"}
	web := "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\nbasic_auth_users:\n"
	for u, pw := range users {
		h, err := bcrypt.GenerateFromPassword([]byte(pw), bcrypt.MinCost)
		if err != nil {
			t.Fatal(err)
		}
		web += "  " + u + ": " + string(h) + "\n"
	}
	audit := &access.Memory{}
	srv, err := server.New(server.Config{
		FleetPath: exampleFleet, GRPCListen: "127.0.0.1:0", HTTPListen: "127.0.0.1:0",
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil)),
		Security: server.Security{
			WebConfig: testpki.Write(t, tmp, "web.yaml", []byte(web)),
			AccessFile: testpki.Write(t, tmp, "access.yaml", []byte(`identities:
  - {name: viewer-all, grants: [{role: viewer}]}
  - {name: op-harrowmere, grants: [{role: operator, sites: [harrowmere]}]}
`)),
			Auditor: audit,
		},
	})
	if err != nil {
		t.Fatalf("server.New: %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- srv.Run(ctx) }()
	t.Cleanup(func() { cancel(); <-done })
	base := "https://localhost:" + srv.HTTPAddr()[strings.LastIndexByte(srv.HTTPAddr(), ':')+1:]
	waitTLSReady(t, base, ca)

	// harrowmere-1 beyond its field current limit (as in
	// TestOperatorPages), fed to the store directly: this test is about
	// the pages.
	store := srv.Store()
	now := time.Now()
	var tally ingest.Tally
	for i, dt := range []time.Duration{-40, -30, -20, -12, -6, -2} {
		smp := ingest.Sample{UnitID: "harrowmere-1", Time: now.Add(dt * time.Second), PMW: 296 + float64(i), QMvar: 232 + 1.5*float64(i), VKV: 20.4, Coolant: 414, HasCoolant: true}
		res, detail := store.Accept(now, &smp)
		if res != ingest.Accepted {
			t.Fatalf("setup sample: %v %s", res, detail)
		}
		tally[res]++
	}
	store.Commit(&tally)
	if l := store.Unit("harrowmere-1").View().Alarms[alarm.Field].Level; l != alarm.Critical {
		t.Fatalf("setup: the field alarm of harrowmere-1 is %s, want critical", l)
	}

	tab, consoleErrors := browser(t, chromium, chromedp.Flag("ignore-certificate-errors", true))
	signIn := func(user string) {
		t.Helper()
		auth := "Basic " + base64.StdEncoding.EncodeToString([]byte(user+":"+users[user]))
		if _, err := chromedp.Call(tab, network.Enable, network.EnableParams{}); err != nil {
			t.Fatal(err)
		}
		if _, err := chromedp.Call(tab, network.SetExtraHTTPHeaders, network.SetExtraHTTPHeadersParams{Headers: network.Headers{"Authorization": auth}}); err != nil {
			t.Fatal(err)
		}
		if err := chromedp.Do(tab, chromedp.Navigate(base+"/units/harrowmere-1"), chromedp.WaitVisible(chromedp.CSS(`[data-alarm="field"]`))); err != nil {
			t.Fatalf("unit page as %s: %v", user, err)
		}
		if got := eval[string](t, tab, `(document.querySelector("[data-signed-in]") || {}).textContent`); got != user {
			t.Errorf("signed in as %q, want %q", got, user)
		}
	}

	// The viewer: the alarm, no buttons, no operator field.
	signIn("viewer-all")
	if n := eval[int](t, tab, `document.querySelectorAll(".alarm-actions form, .alarm-actions button").length`); n != 0 {
		t.Errorf("the viewer sees %d alarm actions, want none", n)
	}
	if eval[bool](t, tab, `!!document.getElementById("operator")`) {
		t.Error("the viewer is offered an operator name field")
	}
	screenshot(t, tab, dir, "viewer-unit.png")

	// The operator of harrowmere acknowledges.
	signIn("op-harrowmere")
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS(`button[data-ack="field"]`))); err != nil {
		t.Fatalf("acknowledging: %v", err)
	}
	waitFor(t, tab, "the alarm to show acknowledged",
		`(() => { const s = document.querySelector('[data-alarm="field"] [data-alarm-state]');
			return !!s && s.textContent.includes("acknowledged") && !s.textContent.includes("not acknowledged"); })()`)
	if got := eval[string](t, tab, `document.querySelector("[data-action-result]").textContent`); !strings.Contains(got, "acknowledged by op-harrowmere") {
		t.Errorf("action result %q, want the operator's identity", got)
	}
	if !store.Unit("harrowmere-1").View().Alarms[alarm.Field].Acknowledged {
		t.Error("the page shows the alarm acknowledged, the store does not")
	}
	var recorded bool
	for _, e := range audit.Find("", "") {
		if e.Action == "web acknowledge" && e.Identity == "op-harrowmere" && e.Outcome == access.OutcomeDone && strings.HasPrefix(e.Target, "harrowmere-1/") {
			recorded = true
		}
	}
	if !recorded {
		t.Errorf("no audit entry of op-harrowmere's acknowledgement in %+v", audit.Find("", ""))
	}
	screenshot(t, tab, dir, "operator-acknowledged.png")

	// The operator of one site sees only its units in the overview, also
	// after the page has refreshed itself from /fleet/live.
	if err := chromedp.Do(tab, chromedp.Navigate(base+"/"), chromedp.WaitVisible(chromedp.CSS(`tr[data-unit]`))); err != nil {
		t.Fatalf("overview as op-harrowmere: %v", err)
	}
	waitFor(t, tab, "the overview to refresh", `document.querySelector("[data-live-status]").classList.contains("is-live")`)
	if got := eval[string](t, tab, `Array.from(document.querySelectorAll("tr[data-unit]")).map(r => r.dataset.unit).join(",")`); got != "harrowmere-1" {
		t.Errorf("overview rows for the harrowmere operator: %q, want harrowmere-1 only", got)
	}
	screenshot(t, tab, dir, "operator-scoped-overview.png")
	if errs := consoleErrors(); len(errs) > 0 {
		t.Errorf("console errors: %v", errs)
	}
}

// waitTLSReady waits until base answers over TLS (401 without
// credentials is an answer).
func waitTLSReady(t *testing.T, base string, ca *testpki.CA) {
	t.Helper()
	client := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: ca.Pool()}}}
	defer client.CloseIdleConnections()
	deadline := time.Now().Add(waitLong)
	for {
		resp, err := client.Get(base + "/readyz")
		if err == nil {
			resp.Body.Close()
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("server not ready within %s: %v", waitLong, err)
		}
		time.Sleep(20 * time.Millisecond)
	}
}
