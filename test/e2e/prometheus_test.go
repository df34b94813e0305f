package e2e

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/test/testenv"

	"google.golang.org/grpc"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

const install = "apt-get install prometheus"

// The service, fed over gRPC with mutual TLS, scraped by a real
// Prometheus over TLS with basic auth (the access file grants the
// gateway's certificate telemetry_writer and Prometheus' user viewer):
// the headroom
// and margins Prometheus stores are the engine's for the pushed sample,
// the sample counters count what was pushed, and promtool finds nothing
// wrong with /metrics.
func TestPrometheusScrape(t *testing.T) {
	if testing.Short() {
		t.Skip("end-to-end: skipped under -short")
	}
	promBin := testenv.NeedTool(t, "prometheus", install)
	promtool := testenv.NeedTool(t, "promtool", install)
	began := time.Now()
	step := func(what string, since time.Time) { t.Logf("%-34s %6.2f s", what, time.Since(since).Seconds()) }

	root := testenv.ModuleRoot(t)
	dir := t.TempDir()
	at := time.Now()
	bin := testenv.BuildGenvelope(t, root, dir)
	step("build ./cmd/genvelope", at)

	// The service.
	fleetPath := filepath.Join(root, "deploy", "examples", "fleet.yaml")
	grpcAddr, httpAddr := testenv.Addr(testenv.FreePort(t)), testenv.Addr(testenv.FreePort(t))
	at = time.Now()
	sec := newSecurity(t, dir)
	gv := testenv.StartProc(t, "genvelope", bin, "serve", "--fleet", fleetPath, "--grpc-listen", grpcAddr, "--http-listen", httpAddr,
		"--state", filepath.Join(dir, "state.json"), "--journal", filepath.Join(dir, "journal.jsonl"),
		"--grpc-tls-cert", sec.serverCert, "--grpc-tls-key", sec.serverKey, "--grpc-client-ca", sec.caPath,
		"--web-config", sec.webConfig, "--access", sec.access)
	sec.waitReady(t, gv, "https://"+httpAddr+"/readyz")
	step("genvelope ready", at)

	// The samples: three of harrowmere-1, the last of which is checked;
	// one of larchwater-2; a resend of the last (a duplicate) and one of
	// a unit that does not exist (rejected).
	t0 := time.Now().Add(-time.Minute).Truncate(time.Millisecond)
	const unit = "harrowmere-1"
	last := &pb.Sample{UnitId: unit, Time: timestamppb.New(t0.Add(2 * time.Second)), PMw: 330, QMvar: 80, VKv: 20,
		FieldA: f64(2500), FrequencyHz: f64(50.1), Coolant: f64(310), Quality: pb.Quality_QUALITY_GOOD}
	batches := []*pb.PushRequest{
		{Sequence: 1, Samples: []*pb.Sample{
			{UnitId: unit, Time: timestamppb.New(t0), PMw: 200, QMvar: 40, VKv: 20.2, Coolant: f64(414)},
			{UnitId: "larchwater-2", Time: timestamppb.New(t0), PMw: 90, QMvar: 25, VKv: 13.8},
			{UnitId: unit, Time: timestamppb.New(t0.Add(time.Second)), PMw: 250, QMvar: 60, VKv: 20.1, Coolant: f64(400)},
		}},
		{Sequence: 2, Samples: []*pb.Sample{last}},
		{Sequence: 3, Samples: []*pb.Sample{last, {UnitId: "nowhere-9", Time: timestamppb.New(t0), PMw: 1, QMvar: 1, VKv: 1}}},
	}
	conn, err := grpc.NewClient(grpcAddr, grpc.WithTransportCredentials(sec.grpcCreds()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	tel := pb.NewTelemetryServiceClient(conn)
	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	var accepted, dups, rejected uint32
	for _, b := range batches {
		resp, err := tel.Push(ctx, b)
		if err != nil {
			gv.Failf(t, "push %d: %v", b.Sequence, err)
		}
		accepted, dups, rejected = accepted+resp.Accepted, dups+resp.Duplicates, rejected+uint32(len(resp.Rejected))
	}
	if accepted != 4 || dups != 1 || rejected != 1 {
		t.Fatalf("pushed: %d accepted, %d duplicates, %d rejected; want 4, 1, 1", accepted, dups, rejected)
	}

	// promtool on the exposition as it is now, with samples in it.
	body := sec.get(t, gv, "https://"+httpAddr+"/metrics")
	cmd := exec.Command(promtool, "check", "metrics")
	cmd.Stdin = bytes.NewReader(body)
	out, err := cmd.CombinedOutput()
	if err != nil || len(bytes.TrimSpace(out)) > 0 {
		t.Errorf("promtool check metrics: %v\n%s", err, out)
	} else {
		t.Logf("promtool check metrics: no problems in %d lines", bytes.Count(body, []byte("\n")))
	}

	// Prometheus, scraping every second.
	promAddr := testenv.Addr(testenv.FreePort(t))
	cfg := filepath.Join(dir, "prometheus.yml")
	writeConfig(t, cfg, httpAddr, sec.scrapeConfig())
	at = time.Now()
	prom := testenv.StartProc(t, "prometheus", promBin,
		"--config.file="+cfg,
		"--storage.tsdb.path="+filepath.Join(dir, "tsdb"),
		"--web.listen-address="+promAddr,
		"--log.level=warn")
	prom.WaitHTTP(t, "http://"+promAddr+"/-/ready")
	step("prometheus ready", at)

	at = time.Now()
	headroom := waitSeries(t, prom, promAddr, fmt.Sprintf(`genvelope_reactive_headroom_vars{unit=%q,direction="up"}`, unit), 1)
	step("first headroom series in prometheus", at)

	// The reference: the engine, called directly on the last sample, in
	// per unit of the unit's base, with the fleet file read here.
	data, err := os.ReadFile(fleetPath)
	if err != nil {
		t.Fatal(err)
	}
	fl, ds := fleet.Parse(fleetPath, data)
	if ds.HasErrors() {
		t.Fatalf("fleet file: %v", ds)
	}
	u := fl.Unit(unit)
	mva := u.Base.MVA
	pt := limits.Point{
		P: last.PMw / mva, Q: last.QMvar / mva, V: last.VKv / u.Base.KV, F: *last.FrequencyHz / u.Base.FrequencyHz,
		Ifd: *last.FieldA / u.Base.IFagA, IfdMeasured: true, Coolant: *last.Coolant, HasCoolant: true,
	}
	// With a hint, as the service evaluates samples: on the avr basis that
	// reads the stability limit from the unit's table, which the series
	// must match exactly. That answer in turn is held to the direct
	// computation (Evaluate without a hint) within 0.002 pu, the limits
	// contract, for every bound the stability limit enters.
	var hint limits.Hint
	res := u.Model.Evaluate(pt, &hint)
	direct := u.Model.Evaluate(pt, nil)
	for _, b := range []struct {
		name          string
		hinted, exact limits.Bound
	}{
		{"q_stability", res.Stability, direct.Stability}, {"practical", res.Practical, direct.Practical},
		{"stability top", res.StabilityTop, direct.StabilityTop}, {"q_max", res.QMax, direct.QMax}, {"q_min", res.QMin, direct.QMin},
	} {
		if b.hinted.OK != b.exact.OK || math.Abs(b.hinted.V-b.exact.V) > 0.002 {
			t.Errorf("%s: the service's path %+v, the direct computation %+v (pu; the contract is 0.002 pu)", b.name, b.hinted, b.exact)
		}
	}
	if !res.QMax.OK {
		t.Fatal("the engine has no q_max at the checked sample: choose another")
	}
	wantUp := (res.QMax.V - pt.Q) * mva * 1e6 // var
	if got := headroom[0].value; !testenv.RelClose(got, wantUp, 1e-6) {
		t.Errorf("prometheus headroom up %.9g var, engine q_max - q %.9g var", got, wantUp)
	}
	// At 330 MW the armature circle binds q_max: Q = √((V·I_max)² - P²)
	// (Kundur, Power System Stability and Control, 1994, §5.4.1), with
	// I_max = 0.95 of rating at 310 kPa hydrogen from the unit's coolant
	// table (deploy/examples/fleet.yaml).
	if res.QMaxLimit == limits.LimitArmature {
		vi := 1.0 * 0.95 * 390
		if want := (math.Sqrt(vi*vi-330*330) - 80) * 1e6; !testenv.RelClose(headroom[0].value, want, 1e-6) {
			t.Errorf("prometheus headroom up %.9g var, armature circle %.9g var", headroom[0].value, want)
		}
	} else {
		t.Errorf("q_max is set by %v at 330 MW, not the armature: the closed-form check needs another point", res.QMaxLimit)
	}

	// Margins: a series for each limit the engine has a margin for, with
	// its value.
	margins := query(t, prom, promAddr, fmt.Sprintf(`genvelope_limit_margin_ratio{unit=%q}`, unit))
	gotM := map[string]float64{}
	for _, s := range margins {
		gotM[s.labels["limit"]] = s.value
	}
	wantM := map[string]float64{}
	all := limits.Limits()
	for _, l := range all {
		if m := res.Margins[l]; m.OK {
			wantM[l.String()] = m.V
		}
	}
	if len(wantM) != len(all) {
		t.Errorf("the engine gives %d margins of %d: harrowmere-1 has every limit (end region included)", len(wantM), len(all))
	}
	if keys(gotM) != keys(wantM) {
		t.Errorf("margin series for %s, want %s", keys(gotM), keys(wantM))
	}
	for l, w := range wantM {
		if g, ok := gotM[l]; ok && !testenv.RelClose(g, w, 1e-6) {
			t.Errorf("margin %s: prometheus %.9g, engine %.9g", l, g, w)
		}
	}
	// Margins with closed forms, as types.proto defines them: armature
	// 1 - I/I_max with I = |S|/V in pu (S = √3·V·I); prime mover
	// (p_max - p)/rated MW; volts per hertz 1 - (V/f)/1.05, 1.05 pu being
	// the continuous V/Hz capability (IEEE Std C50.13-2014 §4.1.5).
	iPU := math.Hypot(330, 80) / 390 / 1.0
	for l, want := range map[string]float64{
		"armature":        1 - iPU/0.95,
		"prime_mover":     (335 - 330) / (390 * 0.85),
		"volts_per_hertz": 1 - (1.0/(50.1/50))/1.05,
	} {
		if g, ok := gotM[l]; !ok || !testenv.RelClose(g, want, 1e-6) {
			t.Errorf("margin %s: prometheus %v (present %v), closed form %.9g", l, g, ok, want)
		}
	}

	// The sample counters count what was pushed.
	for _, c := range []struct {
		q    string
		want float64
	}{
		{`genvelope_samples_total{result="accepted"}`, float64(accepted)},
		{`genvelope_samples_total{result="duplicate"}`, float64(dups)},
		{`genvelope_samples_total{result="unknown_unit"}`, float64(rejected)},
		{fmt.Sprintf(`genvelope_unit_samples_accepted_total{unit=%q}`, unit), 3},
		{`genvelope_unit_samples_accepted_total{unit="larchwater-2"}`, 1},
		{`genvelope_unit_samples_accepted_total{unit="brindle-gt3"}`, 0},
	} {
		s := query(t, prom, promAddr, c.q)
		if len(s) != 1 || s[0].value != c.want {
			t.Errorf("%s: %v, want one series of value %g", c.q, s, c.want)
		}
	}

	// The service stops cleanly on SIGTERM.
	at = time.Now()
	if err := gv.Stop(testenv.WaitLong); err != nil {
		gv.Failf(t, "genvelope after SIGTERM: %v, want exit status 0", err)
	}
	step("genvelope stop on SIGTERM", at)
	step("whole test", began)
}

func f64(x float64) *float64 { return &x }

func writeConfig(t *testing.T, path, target, extra string) {
	t.Helper()
	cfg := fmt.Sprintf(`global:
  scrape_interval: 1s
  scrape_timeout: 1s
  evaluation_interval: 1s
scrape_configs:
  - job_name: genvelope
    static_configs:
      - targets: [%q]
%s`, target, extra)
	if err := os.WriteFile(path, []byte(cfg), 0o644); err != nil {
		t.Fatal(err)
	}
}

func get(t *testing.T, p *testenv.Proc, u string) []byte {
	t.Helper()
	resp, err := http.Get(u)
	if err != nil {
		p.Failf(t, "GET %s: %v", u, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil || resp.StatusCode != http.StatusOK {
		p.Failf(t, "GET %s: %s, %v", u, resp.Status, err)
	}
	return b
}

// series is one element of an instant-vector query result.
type series struct {
	labels map[string]string
	value  float64
}

func (s series) String() string { return fmt.Sprintf("%v=%g", s.labels, s.value) }

// query runs an instant query against Prometheus's HTTP API.
func query(t *testing.T, p *testenv.Proc, promAddr, q string) []series {
	t.Helper()
	body := get(t, p, "http://"+promAddr+"/api/v1/query?query="+url.QueryEscape(q))
	var r struct {
		Status string `json:"status"`
		Error  string `json:"error"`
		Data   struct {
			ResultType string `json:"resultType"`
			Result     []struct {
				Metric map[string]string `json:"metric"`
				Value  [2]any            `json:"value"`
			} `json:"result"`
		} `json:"data"`
	}
	if err := json.Unmarshal(body, &r); err != nil {
		p.Failf(t, "query %s: %v in %s", q, err, body)
	}
	if r.Status != "success" || r.Data.ResultType != "vector" {
		p.Failf(t, "query %s: status %s, result %s, error %q", q, r.Status, r.Data.ResultType, r.Error)
	}
	out := make([]series, 0, len(r.Data.Result))
	for _, e := range r.Data.Result {
		s, _ := e.Value[1].(string)
		v, err := strconv.ParseFloat(s, 64)
		if err != nil {
			p.Failf(t, "query %s: value %v: %v", q, e.Value[1], err)
		}
		out = append(out, series{labels: e.Metric, value: v})
	}
	return out
}

// waitSeries polls a query until it returns n series.
func waitSeries(t *testing.T, p *testenv.Proc, promAddr, q string, n int) []series {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		s := query(t, p, promAddr, q)
		if len(s) == n {
			return s
		}
		if time.Now().After(deadline) {
			targets := get(t, p, "http://"+promAddr+"/api/v1/targets")
			p.Failf(t, "query %s: %d series within %s, want %d; targets: %s", q, len(s), testenv.WaitLong, n, targets)
		}
		time.Sleep(200 * time.Millisecond)
	}
}

func keys(m map[string]float64) string {
	ks := make([]string, 0, len(m))
	for k := range m {
		ks = append(ks, k)
	}
	sort.Strings(ks)
	return strings.Join(ks, ",")
}
