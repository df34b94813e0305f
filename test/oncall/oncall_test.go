package oncall

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/test/testenv"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

const (
	installProm = "apt-get install prometheus"
	installAM   = "apt-get install prometheus-alertmanager"

	// waitPage bounds the wait from the first sample to the page.
	waitPage = 120 * time.Second

	// The placeholder webhook of deploy/alertmanager/alertmanager.yml,
	// pointed at the test's own webhook.
	placeholderWebhook = "http://127.0.0.1:9098"
)

// The example fleet with alarm settings of its own for the underexcited
// limits, which the test reads back to choose where to drive the unit.
const alarmsBlock = `alarms:
  limits:
    stability: {warning: 0.08, critical: 0.02, deadband: 0.01, on_delay_s: 5, off_delay_s: 30}
    end_region: {warning: 0.08, critical: 0.02, deadband: 0.01, on_delay_s: 5, off_delay_s: 30}
    uel: {warning: 0.08, critical: 0.02, deadband: 0.01, on_delay_s: 5, off_delay_s: 30}
`

// The unit driven towards its underexcited limit, at light load and rated
// voltage and hydrogen pressure.
const (
	unit    = "harrowmere-1"
	site    = "harrowmere"
	pMW     = 130.0
	vKV     = 20.0
	coolant = 414.0
	ramp    = 60 // samples of the ramp, one per second of sample time
)

// The whole on-call chain: genvelope takes in telemetry that brings
// harrowmere-1 close to its underexcited limit; its alarm engine raises
// the limit to critical; Prometheus scrapes the alarm level and fires the
// rule of deploy/prometheus/genvelope.rules.yml; Alertmanager, with the
// routing of deploy/alertmanager/alertmanager.yml, pages the on-call
// webhook, here the test's own, with the unit, the limit, the severity
// and a description carrying the headroom in Mvar.
func TestOnCallChain(t *testing.T) {
	if testing.Short() {
		t.Skip("end-to-end: skipped under -short")
	}
	promBin := testenv.NeedTool(t, "prometheus", installProm)
	amBin := testenv.NeedTool(t, "prometheus-alertmanager", installAM)
	began := time.Now()
	step := func(what string, since time.Time) { t.Logf("%-36s %6.2f s", what, time.Since(since).Seconds()) }

	root := testenv.ModuleRoot(t)
	dir := t.TempDir()
	at := time.Now()
	bin := testenv.BuildGenvelope(t, root, dir)
	step("build ./cmd/genvelope", at)

	// The fleet file, and the engine's view of the unit: which limit sets
	// q_min at this active power (bounds do not depend on Q), and the
	// reactive power whose margin is half the critical threshold.
	fleetPath := filepath.Join(dir, "fleet.yaml")
	fleetYAML := append([]byte(alarmsBlock), examples.FleetYAML()...)
	if err := os.WriteFile(fleetPath, fleetYAML, 0o644); err != nil {
		t.Fatal(err)
	}
	fl, ds := fleet.Parse(fleetPath, fleetYAML)
	if ds.HasErrors() {
		t.Fatalf("fleet file: %v", ds)
	}
	u := fl.Unit(unit)
	mva := u.Base.MVA
	point := func(qMvar float64) limits.Point {
		return limits.Point{P: pMW / mva, Q: qMvar / mva, V: vKV / u.Base.KV, F: 1, Coolant: coolant, HasCoolant: true}
	}
	ref := u.Model.Evaluate(point(0), nil)
	if !ref.QMin.OK {
		t.Fatalf("the engine has no q_min for %s at %g MW: choose another point", unit, pMW)
	}
	limit := ref.QMinLimit.String()
	if limit != "stability" && limit != "end_region" && limit != "uel" {
		t.Fatalf("q_min of %s at %g MW is set by %s: the test wants an underexcited limit", unit, pMW, limit)
	}
	kind, ok := alarm.ParseKind(limit)
	if !ok {
		t.Fatalf("no alarm kind %q", limit)
	}
	set := u.Alarms[kind]
	if set.Critical != 0.02 || set.Disabled {
		t.Fatalf("%s alarm of %s: %+v, want the test's alarms block (critical 0.02)", limit, unit, set)
	}
	qMin := ref.QMin.V * mva                    // Mvar
	qEnd := qMin + set.Critical/2*mva           // margin (q - q_limit)/1 pu: half the critical threshold
	qStart := qMin + (set.Warning+0.15)*mva     // well clear of the warning
	final := u.Model.Evaluate(point(qEnd), nil) // the reference for the page's numbers
	_, down := final.Headroom(qEnd / mva)
	wantHeadroom := down.V * mva
	t.Logf("%s at %g MW, %g kV: q_min %.2f Mvar set by %s; driving Q from %.1f to %.1f Mvar (headroom %.2f Mvar)",
		unit, pMW, vKV, qMin, limit, qStart, qEnd, wantHeadroom)

	// The webhook: every notification Alertmanager posts.
	hook := newWebhook(t)

	// The service.
	grpcAddr, httpAddr := testenv.Addr(testenv.FreePort(t)), testenv.Addr(testenv.FreePort(t))
	at = time.Now()
	gv := testenv.StartProc(t, "genvelope", bin, "serve", "--fleet", fleetPath, "--grpc-listen", grpcAddr,
		"--http-listen", httpAddr, "--state", filepath.Join(dir, "state.json"), "--journal", filepath.Join(dir, "journal.jsonl"))
	gv.WaitHTTP(t, "http://"+httpAddr+"/readyz")
	step("genvelope ready", at)

	// Alertmanager, with the deployed configuration, its receivers
	// pointed at the webhook.
	amYAML, err := os.ReadFile(filepath.Join(root, "deploy", "alertmanager", "alertmanager.yml"))
	if err != nil {
		t.Fatal(err)
	}
	if n := bytes.Count(amYAML, []byte(placeholderWebhook+"/")); n != 2 {
		t.Fatalf("alertmanager.yml: %d receiver URLs on %s, want 2 (on-call and team)", n, placeholderWebhook)
	}
	amCfg := filepath.Join(dir, "alertmanager.yml")
	if err := os.WriteFile(amCfg, bytes.ReplaceAll(amYAML, []byte(placeholderWebhook), []byte(hook.url)), 0o644); err != nil {
		t.Fatal(err)
	}
	amAddr := testenv.Addr(testenv.FreePort(t))
	at = time.Now()
	am := testenv.StartProc(t, "alertmanager", amBin,
		"--config.file="+amCfg,
		"--storage.path="+filepath.Join(dir, "am"),
		"--web.listen-address="+amAddr,
		"--cluster.listen-address=", // no gossip: one Alertmanager on loopback
		"--log.level=warn")
	am.WaitHTTP(t, "http://"+amAddr+"/-/ready")
	step("alertmanager ready", at)

	// Prometheus, scraping and evaluating every second, with the deployed
	// rules file as it is.
	promAddr := testenv.Addr(testenv.FreePort(t))
	promCfg := filepath.Join(dir, "prometheus.yml")
	writePromConfig(t, promCfg, httpAddr, amAddr, filepath.Join(root, "deploy", "prometheus", "genvelope.rules.yml"))
	at = time.Now()
	prom := testenv.StartProc(t, "prometheus", promBin,
		"--config.file="+promCfg,
		"--storage.tsdb.path="+filepath.Join(dir, "tsdb"),
		"--web.listen-address="+promAddr,
		"--log.level=warn")
	prom.WaitHTTP(t, "http://"+promAddr+"/-/ready")
	step("prometheus ready", at)

	// The telemetry: a ramp of one sample per second of sample time, the
	// last one a moment ago, Q falling at light load; then the last point
	// held, one sample a second, so the telemetry stays fresh. The other
	// units report a quiet operating point alongside.
	conn, err := grpc.NewClient(grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	tel := pb.NewTelemetryServiceClient(conn)
	var seq uint64
	push := func(samples []*pb.Sample) {
		t.Helper()
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		seq++
		resp, err := tel.Push(ctx, &pb.PushRequest{Sequence: seq, Samples: samples})
		if err != nil {
			gv.Failf(t, "push %d: %v", seq, err)
		}
		if int(resp.Accepted) != len(samples) {
			gv.Failf(t, "push %d: %d of %d samples accepted; rejected %v", seq, resp.Accepted, len(samples), resp.Rejected)
		}
	}
	at = time.Now()
	t0 := at.Add(-ramp * time.Second).Truncate(time.Second)
	var batch []*pb.Sample
	for i := 0; i <= ramp; i++ {
		q := qStart + (qEnd-qStart)*float64(i)/ramp
		batch = append(batch, fleetSamples(t0.Add(time.Duration(i)*time.Second), q)...)
	}
	push(batch)
	last := t0.Add(ramp * time.Second)
	step(fmt.Sprintf("pushed the ramp (%d samples)", len(batch)), at)

	// Wait for the page, holding the last point.
	pushed := at
	deadline := time.NewTimer(waitPage)
	defer deadline.Stop()
	tick := time.NewTicker(time.Second)
	defer tick.Stop()
	var page *pageSeen
	for page == nil {
		select {
		case n := <-hook.c:
			for _, a := range n.Alerts {
				t.Logf("webhook %s: %s %s %v", n.path, n.Receiver, a.Status, a.Labels)
				if a.Status == "firing" && a.Labels["unit"] == unit && a.Labels["limit"] == limit && a.Labels["severity"] == "critical" {
					page = &pageSeen{n, a}
				}
			}
		case <-tick.C:
			if now := time.Now().Truncate(time.Millisecond); now.After(last) {
				push(fleetSamples(now, qEnd))
				last = now
			}
		case <-deadline.C:
			t.Fatalf("no critical %s page for %s within %s of the first sample\nPrometheus alerts: %s\nAlertmanager alerts: %s\ngenvelope alarm metrics:\n%s",
				limit, unit, waitPage, get("http://"+promAddr+"/api/v1/alerts"), get("http://"+amAddr+"/api/v2/alerts"),
				grepLines(get("http://"+httpAddr+"/metrics"), "genvelope_alarm_level{", unit))
		}
	}
	step("critical page received", pushed)

	// The page: on the on-call receiver, with the labels of the rule and
	// the series, and a description an operator can act on.
	n, a := page.n, page.a
	if n.path != "/genvelope/oncall" || n.Receiver != "genvelope-oncall" {
		t.Errorf("the critical page went to %s (receiver %q), want /genvelope/oncall (genvelope-oncall)", n.path, n.Receiver)
	}
	wantAlert := map[string]string{"stability": "GenvelopeStabilityLimit", "end_region": "GenvelopeEndRegionLimit", "uel": "GenvelopeUELLimit"}[limit]
	for k, v := range map[string]string{"alertname": wantAlert, "site": site, "job": "genvelope", "instance": httpAddr} {
		if a.Labels[k] != v {
			t.Errorf("page label %s=%q, want %q (labels %v)", k, a.Labels[k], v, a.Labels)
		}
	}
	desc := a.Annotations["description"]
	t.Logf("summary: %s", a.Annotations["summary"])
	t.Logf("description: %s", desc)
	if !strings.Contains(desc, unit) || !strings.Contains(desc, "Mvar") {
		t.Errorf("description does not name the unit %s and Mvar: %q", unit, desc)
	}
	if !strings.Contains(a.Annotations["summary"], unit) {
		t.Errorf("summary does not name the unit %s: %q", unit, a.Annotations["summary"])
	}
	// The headroom the page gives is the engine's, to the 0.1 Mvar it is
	// printed with; so are the terminal voltage and the active power.
	for _, c := range []struct {
		what string
		re   string
		want float64
		tol  float64
	}{
		{"headroom", `absorbing side: (-?[0-9.]+) Mvar`, wantHeadroom, 0.051},
		{"reactive power", `Now at (-?[0-9.]+) Mvar`, qEnd, 0.051},
		{"active power", `(-?[0-9.]+) MW`, pMW, 0.051},
		{"terminal voltage", `terminal voltage (-?[0-9.]+) kV`, vKV, 0.0051},
	} {
		m := regexp.MustCompile(c.re).FindStringSubmatch(desc)
		if m == nil {
			t.Errorf("description: no %s (%s) in %q", c.what, c.re, desc)
			continue
		}
		got, err := strconv.ParseFloat(m[1], 64)
		if err != nil || math.Abs(got-c.want) > c.tol {
			t.Errorf("description: %s %s, want %.3f within %g", c.what, m[1], c.want, c.tol)
		}
	}
	if rb := a.Annotations["runbook"]; !strings.HasPrefix(rb, "deploy/prometheus/README.md#") {
		t.Errorf("runbook annotation %q", rb)
	}
	step("whole test", began)
}

// fleetSamples returns one sample of each unit at time ts: harrowmere-1
// at reactive power q, the others at a quiet operating point.
func fleetSamples(ts time.Time, q float64) []*pb.Sample {
	f := func(x float64) *float64 { return &x }
	tp := timestamppb.New(ts)
	return []*pb.Sample{
		{UnitId: unit, Time: tp, PMw: pMW, QMvar: q, VKv: vKV, FrequencyHz: f(50), Coolant: f(coolant)},
		{UnitId: "larchwater-2", Time: tp, PMw: 80, QMvar: 20, VKv: 13.8, FrequencyHz: f(50)},
		{UnitId: "brindle-gt3", Time: tp, PMw: 100, QMvar: 30, VKv: 15, FrequencyHz: f(50), Coolant: f(15)},
	}
}

func writePromConfig(t *testing.T, path, target, alertmanager, rules string) {
	t.Helper()
	cfg := fmt.Sprintf(`global:
  scrape_interval: 1s
  scrape_timeout: 1s
  evaluation_interval: 1s
rule_files: [%q]
alerting:
  alertmanagers:
    - static_configs:
        - targets: [%q]
scrape_configs:
  - job_name: genvelope
    static_configs:
      - targets: [%q]
`, rules, alertmanager, target)
	if err := os.WriteFile(path, []byte(cfg), 0o644); err != nil {
		t.Fatal(err)
	}
}

// notification is one webhook post of Alertmanager (the fields used here).
type notification struct {
	path     string    // where it was posted
	Receiver string    `json:"receiver"`
	Status   string    `json:"status"`
	Alerts   []amAlert `json:"alerts"`
}

// amAlert is one alert of a notification.
type amAlert struct {
	Status      string            `json:"status"`
	Labels      map[string]string `json:"labels"`
	Annotations map[string]string `json:"annotations"`
}

// pageSeen is the alert the test waits for and the notification it came in.
type pageSeen struct {
	n notification
	a amAlert
}

// webhook is an HTTP server on loopback that hands every notification
// posted to it to c; it is closed when the test ends.
type webhook struct {
	url string
	c   chan notification
}

func newWebhook(t *testing.T) *webhook {
	t.Helper()
	h := &webhook{c: make(chan notification, 64)}
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		var n notification
		if err := json.NewDecoder(r.Body).Decode(&n); err != nil {
			http.Error(w, err.Error(), http.StatusBadRequest)
			return
		}
		n.path = r.URL.Path
		select {
		case h.c <- n:
		default: // the test has stopped reading
		}
	}))
	t.Cleanup(srv.Close)
	h.url = srv.URL
	return h
}

// grepLines returns the lines of text that contain every one of words.
func grepLines(text string, words ...string) string {
	var out []string
	for _, l := range strings.Split(text, "\n") {
		all := true
		for _, w := range words {
			all = all && strings.Contains(l, w)
		}
		if all {
			out = append(out, l)
		}
	}
	return strings.Join(out, "\n")
}
