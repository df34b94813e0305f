package dashboard

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/test/testenv"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/durationpb"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/deploy/examples"
)

const install = "apt-get install -y prometheus"

// waitData bounds the wait for every panel query to return data once the
// samples are in: a few scrapes at 1 s, with room for a slow machine.
const waitData = 45 * time.Second

// rangeWindow is the span of the range queries, ending now; the step is
// the scrape interval.
const (
	rangeWindow = 2 * time.Minute
	rangeStep   = time.Second
)

// query is one panel target as the test runs it.
type query struct {
	where   string // panel and target, for messages
	written string // the expr as in the dashboard
	expr    string // after substitution
	instant bool
	rng     bool
}

// Every query of the dashboard returns data from a real Prometheus
// scraping the real service: the template variables list the example
// fleet's sites and units (and follow each other), and every panel
// target, with the variables set to All and Grafana's interval variables
// filled in, returns at least one series, as an instant query where the
// panel asks for one and as a range query where it draws a graph.
func TestDashboardQueries(t *testing.T) {
	if testing.Short() {
		t.Skip("end-to-end: skipped under -short")
	}
	promBin := testenv.NeedTool(t, "prometheus", install)
	began := time.Now()
	step := func(what string, since time.Time) { t.Logf("%-36s %6.2f s", what, time.Since(since).Seconds()) }

	root := testenv.ModuleRoot(t)
	d := loadDashboard(t, root)
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	unitsBySite := map[string][]string{}
	var allUnits, allSites []string
	for _, u := range fl.Units {
		if len(unitsBySite[u.Site]) == 0 {
			allSites = append(allSites, u.Site)
		}
		unitsBySite[u.Site] = append(unitsBySite[u.Site], u.ID)
		allUnits = append(allUnits, u.ID)
	}
	sort.Strings(allSites)
	sort.Strings(allUnits)

	dir := t.TempDir()
	at := time.Now()
	bin := testenv.BuildGenvelope(t, root, dir)
	step("build ./cmd/genvelope", at)

	// The service, on the example fleet.
	fleetPath := filepath.Join(root, "deploy", "examples", "fleet.yaml")
	grpcAddr, httpAddr := testenv.Addr(testenv.FreePort(t)), testenv.Addr(testenv.FreePort(t))
	at = time.Now()
	gv := testenv.StartProc(t, "genvelope", bin, "serve", "--fleet", fleetPath, "--grpc-listen", grpcAddr, "--http-listen", httpAddr,
		"--state", filepath.Join(dir, "state.json"), "--journal", filepath.Join(dir, "journal.jsonl"))
	gv.WaitHTTP(t, "http://"+httpAddr+"/readyz")
	step("genvelope ready", at)

	// Prometheus, scraping every second. It scrapes once before the
	// samples arrive, so the counters rise inside the rate windows.
	promAddr := testenv.Addr(testenv.FreePort(t))
	cfg := filepath.Join(dir, "prometheus.yml")
	writeConfig(t, cfg, httpAddr)
	at = time.Now()
	prom := testenv.StartProc(t, "prometheus", promBin,
		"--config.file="+cfg,
		"--storage.tsdb.path="+filepath.Join(dir, "tsdb"),
		"--web.listen-address="+promAddr,
		"--log.level=warn")
	prom.WaitHTTP(t, "http://"+promAddr+"/-/ready")
	api := &promAPI{t: t, p: prom, base: "http://" + promAddr}
	api.waitFor(`up{job="genvelope"} == 1`, testenv.WaitLong)
	step("prometheus ready, first scrape", at)

	at = time.Now()
	pushSamples(t, gv, grpcAddr)
	step("samples pushed, alarms acted on", at)

	// The template variables, in order, each with the ones before it
	// set: their values are the example fleet's, and unit follows site.
	at = time.Now()
	vals := map[string]string{}
	for _, v := range d.Templating.List {
		switch v.Type {
		case "datasource":
			continue // a data source name, never in a query
		case "query":
		default:
			t.Fatalf("variable %q: type %q, which the test does not know how to resolve", v.Name, v.Type)
		}
		got := api.variableValues(v, vals, testenv.WaitLong)
		switch v.Name {
		case "site":
			if strings.Join(got, ",") != strings.Join(allSites, ",") {
				t.Errorf("variable site: %v, want the example fleet's sites %v", got, allSites)
			}
		case "unit":
			if strings.Join(got, ",") != strings.Join(allUnits, ",") {
				t.Errorf("variable unit: %v, want the example fleet's units %v", got, allUnits)
			}
			// With one site chosen, unit lists that site's units only.
			one := map[string]string{}
			for k, x := range vals {
				one[k] = x
			}
			one["site"] = regexp.QuoteMeta(allSites[0])
			sub := api.variableValues(v, one, testenv.WaitLong)
			want := append([]string(nil), unitsBySite[allSites[0]]...)
			sort.Strings(want)
			if strings.Join(sub, ",") != strings.Join(want, ",") {
				t.Errorf("variable unit with site=%s: %v, want %v", allSites[0], sub, want)
			}
		}
		switch {
		case v.IncludeAll && v.AllValue != nil && *v.AllValue != "":
			vals[v.Name] = *v.AllValue
		case v.IncludeAll:
			q := make([]string, len(got))
			for i, x := range got {
				q[i] = regexp.QuoteMeta(x)
			}
			vals[v.Name] = "(" + strings.Join(q, "|") + ")"
		default:
			vals[v.Name] = regexp.QuoteMeta(got[0])
		}
		t.Logf("variable %-9s %d values %v, queries use %q", v.Name, len(got), got, vals[v.Name])
	}
	step("template variables", at)

	// Every panel target.
	var qs []query
	for _, p := range allPanels(d) {
		for _, tg := range p.Targets {
			if tg.Hide {
				continue
			}
			e, err := substitute(tg.Expr, vals)
			if err != nil {
				t.Fatalf("%s: %v in %s", p.where(tg), err, tg.Expr)
			}
			qs = append(qs, query{where: p.where(tg), written: tg.Expr, expr: e, instant: tg.Instant, rng: tg.Range})
		}
	}
	at = time.Now()
	empty := qs
	for rounds := 1; ; rounds++ {
		var still []query
		for _, q := range empty {
			if q.instant && api.instant(q) == 0 || q.rng && api.rangeQuery(q) == 0 {
				still = append(still, q)
			}
		}
		empty = still
		if len(empty) == 0 {
			t.Logf("all %d panel queries returned data after %d rounds", len(qs), rounds)
			break
		}
		if time.Since(at) > waitData {
			for _, q := range empty {
				kind := "instant"
				if q.rng && (!q.instant || api.instant(q) > 0) {
					kind = "range"
				}
				t.Errorf("%s: the %s query returned no series within %s\n  expr in the dashboard: %s\n  expr as run:           %s",
					q.where, kind, waitData, q.written, q.expr)
			}
			break
		}
		time.Sleep(time.Second)
	}
	step("panel queries", at)

	if err := gv.Stop(testenv.WaitLong); err != nil {
		gv.Failf(t, "genvelope after SIGTERM: %v, want exit status 0", err)
	}
	step("whole test", began)
}

// pushSamples gives every unit of the example fleet samples, drives one
// unit into alarm, and leaves a duplicate, rejected samples, an
// acknowledged alarm and a shelved one, so that every panel has
// something to show.
func pushSamples(t *testing.T, gv *testenv.Proc, grpcAddr string) {
	t.Helper()
	conn, err := grpc.NewClient(grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	f := func(x float64) *float64 { return &x }
	ts := func(t0 time.Time, s int) *timestamppb.Timestamp {
		return timestamppb.New(t0.Add(time.Duration(s) * time.Second))
	}

	t0 := time.Now().Add(-time.Minute).Truncate(time.Millisecond)
	var normal, over []*pb.Sample
	for s := 0; s < 3; s++ {
		normal = append(normal,
			&pb.Sample{UnitId: "harrowmere-1", Time: ts(t0, s), PMw: 250 + 20*float64(s), QMvar: 60, VKv: 20.1,
				FieldA: f(2400), FrequencyHz: f(50), Coolant: f(400), Quality: pb.Quality_QUALITY_GOOD},
			&pb.Sample{UnitId: "brindle-gt3", Time: ts(t0, s), PMw: 100, QMvar: 30, VKv: 15, FrequencyHz: f(50), Coolant: f(15)})
	}
	// larchwater-2 at 115 MW, past its prime mover's 110 MW, for longer
	// than the default 5 s on-delay (sample time): a critical alarm on
	// prime_mover, and a warning on armature (2.7 % left).
	for s := 0; s <= 8; s++ {
		over = append(over, &pb.Sample{UnitId: "larchwater-2", Time: ts(t0, s), PMw: 115, QMvar: 20, VKv: 13.8, FrequencyHz: f(50)})
	}
	batches := []*pb.PushRequest{
		{Sequence: 1, Samples: normal},
		{Sequence: 2, Samples: over},
		{Sequence: 3, Samples: []*pb.Sample{
			normal[0], // a resend: duplicate
			{UnitId: "nowhere-9", Time: ts(t0, 0), PMw: 1, QMvar: 1, VKv: 1},                         // unknown_unit
			{UnitId: "brindle-gt3", Time: ts(t0, 10), PMw: 5000, QMvar: 30, VKv: 15, Coolant: f(15)}, // out_of_range
		}},
	}
	tel := pb.NewTelemetryServiceClient(conn)
	var accepted, dups, rejected int
	for _, b := range batches {
		resp, err := tel.Push(ctx, b)
		if err != nil {
			gv.Failf(t, "push %d: %v", b.Sequence, err)
		}
		accepted, dups, rejected = accepted+int(resp.Accepted), dups+int(resp.Duplicates), rejected+len(resp.Rejected)
	}
	if want := len(normal) + len(over); accepted != want || dups != 1 || rejected != 2 {
		t.Fatalf("pushed: %d accepted, %d duplicates, %d rejected; want %d, 1, 2", accepted, dups, rejected, want)
	}

	alarms := pb.NewAlarmServiceClient(conn)
	if _, err := alarms.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: "larchwater-2", Limit: "prime_mover", Operator: "dashboard test"}); err != nil {
		gv.Failf(t, "acknowledge larchwater-2 prime_mover (should be critical after %d s over p_max): %v", len(over)-1, err)
	}
	if _, err := alarms.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: "brindle-gt3", Limit: "stale_telemetry",
		Duration: durationpb.New(time.Hour), Operator: "dashboard test", Reason: "test"}); err != nil {
		gv.Failf(t, "shelve brindle-gt3 stale_telemetry: %v", err)
	}
}

func writeConfig(t *testing.T, path, target string) {
	t.Helper()
	cfg := fmt.Sprintf(`global:
  scrape_interval: 1s
  scrape_timeout: 1s
  evaluation_interval: 1s
scrape_configs:
  - job_name: genvelope
    static_configs:
      - targets: [%q]
`, target)
	if err := os.WriteFile(path, []byte(cfg), 0o644); err != nil {
		t.Fatal(err)
	}
}

// promAPI runs queries against Prometheus's HTTP API. A query Prometheus
// refuses (bad PromQL) fails the test at once: no wait fixes it.
type promAPI struct {
	t    *testing.T
	p    *testenv.Proc
	base string
}

// call GETs path with the parameters and decodes the API's envelope,
// returning its data.
func (a *promAPI) call(what, path string, params url.Values) json.RawMessage {
	a.t.Helper()
	resp, err := http.Get(a.base + path + "?" + params.Encode())
	if err != nil {
		a.p.Failf(a.t, "%s: GET %s: %v", what, path, err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		a.p.Failf(a.t, "%s: GET %s: %v", what, path, err)
	}
	var r struct {
		Status    string          `json:"status"`
		ErrorType string          `json:"errorType"`
		Error     string          `json:"error"`
		Data      json.RawMessage `json:"data"`
	}
	if err := json.Unmarshal(body, &r); err != nil {
		a.p.Failf(a.t, "%s: GET %s: %s: %v in %s", what, path, resp.Status, err, body)
	}
	if r.Status != "success" {
		a.t.Fatalf("%s: Prometheus refused it (%s): %s: %s\n  %s %v", what, resp.Status, r.ErrorType, r.Error, path, params)
	}
	return r.Data
}

type result struct {
	ResultType string            `json:"resultType"`
	Result     []json.RawMessage `json:"result"`
}

// instant runs q as an instant query and returns the number of series
// (1 for a scalar).
func (a *promAPI) instant(q query) int {
	a.t.Helper()
	var r result
	data := a.call(q.where+": instant query "+q.expr, "/api/v1/query", url.Values{"query": {q.expr}})
	if err := json.Unmarshal(data, &r); err != nil {
		a.t.Fatalf("%s: %v in %s", q.where, err, data)
	}
	if r.ResultType == "scalar" {
		return 1
	}
	return len(r.Result)
}

// rangeQuery runs q over the last rangeWindow and returns the number of
// series with at least one point.
func (a *promAPI) rangeQuery(q query) int {
	a.t.Helper()
	end := time.Now()
	params := url.Values{
		"query": {q.expr},
		"start": {unix(end.Add(-rangeWindow))},
		"end":   {unix(end)},
		"step":  {strconv.FormatFloat(rangeStep.Seconds(), 'f', -1, 64)},
	}
	var r struct {
		ResultType string `json:"resultType"`
		Result     []struct {
			Values []json.RawMessage `json:"values"`
		} `json:"result"`
	}
	data := a.call(q.where+": range query "+q.expr, "/api/v1/query_range", params)
	if err := json.Unmarshal(data, &r); err != nil {
		a.t.Fatalf("%s: %v in %s", q.where, err, data)
	}
	n := 0
	for _, s := range r.Result {
		if len(s.Values) > 0 {
			n++
		}
	}
	return n
}

// waitFor polls an instant query until it returns a series.
func (a *promAPI) waitFor(expr string, within time.Duration) {
	a.t.Helper()
	deadline := time.Now().Add(within)
	for a.instant(query{where: "wait", expr: expr}) == 0 {
		if time.Now().After(deadline) {
			a.p.Failf(a.t, "%s: no series within %s", expr, within)
		}
		time.Sleep(200 * time.Millisecond)
	}
}

// variableValues resolves a label_values variable the way Grafana does,
// through the label values API over the last rangeWindow, with the
// variables before it substituted. It waits for at least one value.
func (a *promAPI) variableValues(v variable, vals map[string]string, within time.Duration) []string {
	a.t.Helper()
	q, err := substitute(v.queryText(), vals)
	if err != nil {
		a.t.Fatalf("variable %q: %v in %s", v.Name, err, v.queryText())
	}
	m := labelValuesQuery.FindStringSubmatch(q)
	if m == nil {
		a.t.Fatalf("variable %q: query %q is not label_values(...)", v.Name, q)
	}
	deadline := time.Now().Add(within)
	for {
		end := time.Now()
		params := url.Values{"start": {unix(end.Add(-rangeWindow))}, "end": {unix(end)}}
		if m[1] != "" {
			params.Set("match[]", m[1])
		}
		var got []string
		data := a.call(fmt.Sprintf("variable %q: %s", v.Name, q), "/api/v1/label/"+m[2]+"/values", params)
		if err := json.Unmarshal(data, &got); err != nil {
			a.t.Fatalf("variable %q: %v in %s", v.Name, err, data)
		}
		if len(got) > 0 {
			sort.Strings(got)
			return got
		}
		if time.Now().After(deadline) {
			a.t.Fatalf("variable %q: %s returned no values within %s (as written: %s)", v.Name, q, within, v.queryText())
		}
		time.Sleep(200 * time.Millisecond)
	}
}

func unix(t time.Time) string {
	return strconv.FormatFloat(float64(t.UnixNano())/1e9, 'f', 3, 64)
}
