package web

import (
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/chart"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
)

// fixture is a store over a fleet and the web interface over it, served
// by an httptest server.
type fixture struct {
	store *ingest.Store
	ui    *UI
	srv   *httptest.Server
	now   time.Time
}

func quietLog() *slog.Logger { return slog.New(slog.NewTextHandler(io.Discard, nil)) }

func newFixture(t *testing.T, fl *fleet.Fleet) *fixture {
	t.Helper()
	if fl == nil {
		var err error
		if fl, err = examples.Fleet(); err != nil {
			t.Fatal(err)
		}
	}
	now := time.Now()
	f := &fixture{store: ingest.NewStore(fl, ingest.Options{}), now: now}
	f.ui = New(f.store, Options{Logger: quietLog(), Now: func() time.Time { return f.now }})
	f.srv = httptest.NewServer(f.ui)
	t.Cleanup(f.srv.Close)
	return f
}

// push accepts one sample of unit id, at sample time at.
func (f *fixture) push(t *testing.T, id string, at time.Time, pMW, qMvar, vKV float64) {
	t.Helper()
	s := ingest.Sample{UnitID: id, Time: at, PMW: pMW, QMvar: qMvar, VKV: vKV}
	if cfg := f.store.Fleet().Unit(id); cfg != nil && cfg.Coolant != nil {
		s.Coolant, s.HasCoolant = cfg.Coolant.Points[len(cfg.Coolant.Points)-1].At, true
	}
	if res, detail := f.store.Accept(f.now, &s); res != ingest.Accepted {
		t.Fatalf("sample of %s not accepted: %s %s", id, res, detail)
	}
	f.ui.trails.sample(f.store) // as Run does
}

// overField drives harrowmere-1 past its field current limit for longer
// than the on-delay (q_max is about 226 Mvar at 300 MW, 20.4 kV and full
// hydrogen pressure), so its field alarm is critical (and its armature
// alarm a warning).
func (f *fixture) overField(t *testing.T) {
	t.Helper()
	for _, dt := range []time.Duration{-20 * time.Second, -12 * time.Second, -2 * time.Second} {
		f.push(t, "harrowmere-1", f.now.Add(dt), 300, 230, 20.4)
	}
	if f.store.Unit("harrowmere-1").View().Alarms[alarm.Field].Level != alarm.Critical {
		t.Fatal("setup: the field alarm of harrowmere-1 is not critical")
	}
}

// normal gives every example unit a sample well inside its envelope.
func (f *fixture) normal(t *testing.T) {
	t.Helper()
	at := f.now.Add(-time.Minute)
	f.push(t, "harrowmere-1", at, 280, 60, 20.2)
	f.push(t, "larchwater-2", at, 70, 10, 13.8)
	f.push(t, "brindle-gt3", at, 100, 20, 15.1)
}

type response struct {
	status int
	header http.Header
	body   string
}

func (f *fixture) do(t *testing.T, method, path string, form url.Values, header map[string]string) response {
	t.Helper()
	var body io.Reader
	if form != nil {
		body = strings.NewReader(form.Encode())
	}
	req, err := http.NewRequestWithContext(t.Context(), method, f.srv.URL+path, body)
	if err != nil {
		t.Fatal(err)
	}
	if form != nil {
		req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	}
	for k, v := range header {
		req.Header.Set(k, v)
	}
	client := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	resp, err := client.Do(req)
	if err != nil {
		t.Fatalf("%s %s: %v", method, path, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return response{resp.StatusCode, resp.Header, string(b)}
}

func (f *fixture) get(t *testing.T, path string) response {
	return f.do(t, http.MethodGet, path, nil, nil)
}

func wantContains(t *testing.T, what, body string, wants ...string) {
	t.Helper()
	for _, w := range wants {
		if !strings.Contains(body, w) {
			t.Errorf("%s does not contain %q", what, w)
		}
	}
}

// caution is how the caution sentence reads in HTML.
var caution = strings.ReplaceAll(fleet.Caution, "'", "&#39;")

func TestPagesRender(t *testing.T) {
	tests := []struct {
		name    string
		setup   func(*testing.T, *fixture)
		unit    []string // more for every unit page
		first   []string // more for the page of harrowmere-1
		overall []string // more for the overview
	}{
		{"no samples", func(*testing.T, *fixture) {}, []string{"No data from this unit yet", "rated voltage"}, nil, []string{"never"}},
		{"samples", func(t *testing.T, f *fixture) { f.normal(t) }, []string{chart.ClassOperatingPoint, `data-value="p_mw"`, "Critical clearing time", "Margins to each limit",
			"avr basis: voltage regulator in service", "Underexcitation limiter", "rotor mode"},
			[]string{"No active or shelved alarms"}, []string{"left", "280.0"}},
		{"alarm", func(t *testing.T, f *fixture) { f.normal(t); f.overField(t) }, nil,
			[]string{chart.ClassOperatingTrail, "Acknowledge", "OUTSIDE THE ENVELOPE", `data-alarm="field"`, `data-alarm="armature"`}, []string{"lvl-critical", "outside"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			f := newFixture(t, nil)
			tt.setup(t, f)
			r := f.get(t, "/")
			if r.status != http.StatusOK {
				t.Fatalf("GET /: %d", r.status)
			}
			if ct := r.header.Get("Content-Type"); !strings.HasPrefix(ct, "text/html") {
				t.Errorf("GET /: Content-Type %q", ct)
			}
			if r.header.Get("Content-Security-Policy") == "" {
				t.Error("GET /: no Content-Security-Policy")
			}
			wantContains(t, "overview", r.body, append([]string{caution, f.ui.assets["app.css"], f.ui.assets["app.js"], "data-sortable"}, tt.overall...)...)
			for _, u := range f.store.Fleet().Units {
				wantContains(t, "overview", r.body, `href="/units/`+u.ID+`"`, u.Name)
				p := f.get(t, "/units/"+u.ID)
				if p.status != http.StatusOK {
					t.Fatalf("GET /units/%s: %d", u.ID, p.status)
				}
				wantContains(t, u.ID+" page", p.body, append([]string{caution, "<svg", u.Name, `data-part="unit-chart"`, `data-part="unit-alarms"`}, tt.unit...)...)
				if u.ID == "harrowmere-1" {
					wantContains(t, u.ID+" page", p.body, tt.first...)
				}
				if strings.Contains(p.body, "<?xml") {
					t.Errorf("%s page: the chart keeps its XML prolog", u.ID)
				}
			}
		})
	}
}

// TestOverviewWorstFirst checks the overview's default order: the unit
// with a critical alarm first.
func TestOverviewWorstFirst(t *testing.T) {
	f := newFixture(t, nil)
	f.normal(t)
	f.overField(t)
	r := f.get(t, "/")
	first := strings.Index(r.body, `data-unit="`)
	if first < 0 || !strings.HasPrefix(r.body[first:], `data-unit="harrowmere-1"`) {
		t.Errorf("the first row is not harrowmere-1, the unit with a critical alarm")
	}
	d := f.ui.fleetData()
	if d.Critical != 1 || d.Rows[0].ID != "harrowmere-1" || d.Rows[0].Rank != 0 {
		t.Errorf("fleet data: %d critical, first row %s (rank %d)", d.Critical, d.Rows[0].ID, d.Rows[0].Rank)
	}
}

func TestEscaping(t *testing.T) {
	const evil = `<script>alert("x")</script>`
	yaml := strings.Replace(string(examples.FleetYAML()), "name: Harrowmere unit 1", `name: '`+evil+`'`, 1)
	fl, ds := fleet.Parse("evil.yaml", []byte(yaml))
	if ds.HasErrors() {
		t.Fatalf("fleet: %v", ds)
	}
	if fl.Unit("harrowmere-1").Name != evil {
		t.Fatalf("setup: name %q", fl.Unit("harrowmere-1").Name)
	}
	f := newFixture(t, fl)
	f.normal(t)
	f.overField(t)
	for _, path := range []string{"/", "/units/harrowmere-1", "/units/harrowmere-1/live", "/fleet/live"} {
		r := f.get(t, path)
		if r.status != http.StatusOK {
			t.Fatalf("GET %s: %d", path, r.status)
		}
		body := r.body
		if strings.HasSuffix(path, "/live") {
			var j struct{ Sections map[string]string }
			if err := json.Unmarshal([]byte(r.body), &j); err != nil {
				t.Fatal(err)
			}
			var b strings.Builder
			for _, s := range j.Sections {
				b.WriteString(s)
			}
			body = b.String()
		}
		if strings.Contains(body, "<script>alert") {
			t.Errorf("GET %s: the unit's name is markup, not text", path)
		}
		if !strings.Contains(body, "&lt;script&gt;alert(") {
			t.Errorf("GET %s: the escaped name is missing", path)
		}
	}
}

func TestUnknownUnit(t *testing.T) {
	f := newFixture(t, nil)
	tests := []struct {
		path, want string
	}{
		{"/units/nowhere-9", `There is no unit &#34;nowhere-9&#34; in the fleet.`},
		{"/units/%3Cb%3Ebold%3C%2Fb%3E", `There is no unit &#34;&lt;b&gt;bold&lt;/b&gt;&#34;`},
		{"/no/such/page", "There is no page at /no/such/page."},
	}
	for _, tt := range tests {
		r := f.get(t, tt.path)
		if r.status != http.StatusNotFound {
			t.Errorf("GET %s: %d, want 404", tt.path, r.status)
		}
		wantContains(t, tt.path, r.body, tt.want, caution, `href="/"`)
	}
	r := f.get(t, "/units/nowhere-9/live")
	if r.status != http.StatusNotFound || !strings.Contains(r.header.Get("Content-Type"), "json") {
		t.Errorf("GET /units/nowhere-9/live: %d %s", r.status, r.header.Get("Content-Type"))
	}
}

func TestLiveEndpoints(t *testing.T) {
	f := newFixture(t, nil)
	f.normal(t)
	f.overField(t)

	var fl struct {
		Clock    string
		Sections map[string]string
		Units    []struct{ Unit, Level string }
		Caution  string
	}
	r := f.get(t, "/fleet/live")
	if r.status != http.StatusOK {
		t.Fatalf("GET /fleet/live: %d", r.status)
	}
	if err := json.Unmarshal([]byte(r.body), &fl); err != nil {
		t.Fatal(err)
	}
	if fl.Caution != fleet.Caution || fl.Clock == "" {
		t.Errorf("fleet live: caution %q, clock %q", fl.Caution, fl.Clock)
	}
	if len(fl.Units) != 3 || fl.Units[0].Unit != "harrowmere-1" || fl.Units[0].Level != "critical" {
		t.Errorf("fleet live units: %+v", fl.Units)
	}
	wantContains(t, "fleet-rows", fl.Sections["fleet-rows"], `<tr data-unit="harrowmere-1"`, `data-unit="larchwater-2"`)
	wantContains(t, "fleet-summary", fl.Sections["fleet-summary"], "critical")

	var u struct {
		Unit       string
		Sections   map[string]string
		Evaluation *struct {
			PMW   float64 `json:"p_mw"`
			QMvar float64 `json:"q_mvar"`
		}
		Alarms []struct {
			Kind, Level  string
			Acknowledged bool
			Message      string
		}
	}
	r = f.get(t, "/units/harrowmere-1/live")
	if r.status != http.StatusOK {
		t.Fatalf("GET /units/harrowmere-1/live: %d", r.status)
	}
	if err := json.Unmarshal([]byte(r.body), &u); err != nil {
		t.Fatal(err)
	}
	if u.Evaluation == nil || u.Evaluation.PMW != 300 || u.Evaluation.QMvar != 230 {
		t.Errorf("evaluation: %+v", u.Evaluation)
	}
	for _, s := range []string{"unit-status", "unit-tiles", "unit-numbers", "unit-alarms", "unit-chart"} {
		if u.Sections[s] == "" {
			t.Errorf("section %s missing", s)
		}
	}
	wantContains(t, "unit-tiles", u.Sections["unit-tiles"], ">300.0<", ">230.0<")
	wantContains(t, "unit-numbers", u.Sections["unit-numbers"], "Margins to each limit", `data-value="margin-field"`)
	wantContains(t, "unit-chart", u.Sections["unit-chart"], chart.ClassOperatingPoint, "<svg")
	found := false
	for _, a := range u.Alarms {
		if a.Kind == "field" && a.Level == "critical" && !a.Acknowledged && strings.Contains(a.Message, "field current limit") {
			found = true
		}
	}
	if !found {
		t.Errorf("the critical field alarm is not in the live alarms: %+v", u.Alarms)
	}

	// A unit without samples: no evaluation.
	f2 := newFixture(t, nil)
	r = f2.get(t, "/units/larchwater-2/live")
	if r.status != http.StatusOK || !strings.Contains(r.body, `"evaluation":null`) {
		t.Errorf("unit without samples: %d %s", r.status, r.body[:min(200, len(r.body))])
	}
}

func TestAlarmActions(t *testing.T) {
	const base = "/units/harrowmere-1/alarms/"
	jsonAccept := map[string]string{"Accept": "application/json"}
	tests := []struct {
		name     string
		path     string
		form     url.Values
		header   map[string]string
		status   int
		location string
		check    func(t *testing.T, f *fixture)
	}{
		{
			name: "acknowledge from a form", path: base + "field/acknowledge", form: url.Values{"operator": {"  M. Okafor "}},
			status: http.StatusSeeOther, location: "/units/harrowmere-1#alarms",
			check: func(t *testing.T, f *fixture) {
				if !f.store.Unit("harrowmere-1").View().Alarms[alarm.Field].Acknowledged {
					t.Error("the store has the alarm not acknowledged")
				}
			},
		},
		{
			name: "acknowledge by script", path: base + "field/acknowledge", form: url.Values{"operator": {"K. Brandt"}}, header: jsonAccept, status: http.StatusOK,
			check: func(t *testing.T, f *fixture) {
				for _, ev := range f.store.Active() {
					if ev.Unit == "harrowmere-1" && ev.Kind == alarm.Field && !ev.Acknowledged {
						t.Error("Active has the alarm not acknowledged")
					}
				}
			},
		},
		{
			name: "shelve", path: base + "field/shelve", form: url.Values{"duration": {"1h"}, "operator": {"K. Brandt"}}, header: jsonAccept, status: http.StatusOK,
			check: func(t *testing.T, f *fixture) {
				m := f.store.Unit("harrowmere-1").View().Alarms[alarm.Field]
				if want := f.now.Add(time.Hour).UnixNano(); m.ShelvedUntil != want {
					t.Errorf("shelved until %d, want %d", m.ShelvedUntil, want)
				}
			},
		},
		{name: "shelve too long", path: base + "field/shelve", form: url.Values{"duration": {"72h"}}, header: jsonAccept, status: http.StatusBadRequest},
		{name: "shelve without duration", path: base + "field/shelve", form: url.Values{}, status: http.StatusBadRequest},
		{name: "acknowledge a quiet alarm", path: base + "stability/acknowledge", form: url.Values{"operator": {"K. Brandt"}}, header: jsonAccept, status: http.StatusConflict},
		{name: "acknowledge without a name", path: base + "field/acknowledge", form: url.Values{"operator": {"  "}}, header: jsonAccept, status: http.StatusBadRequest},
		{name: "unknown alarm", path: base + "sparks/acknowledge", form: url.Values{}, status: http.StatusNotFound},
		{name: "unknown action", path: base + "field/silence", form: url.Values{}, header: jsonAccept, status: http.StatusNotFound},
		{name: "unknown unit", path: "/units/nowhere-9/alarms/field/acknowledge", form: url.Values{}, status: http.StatusNotFound},
		{
			name: "cross-origin", path: base + "field/acknowledge", form: url.Values{},
			header: map[string]string{"Sec-Fetch-Site": "cross-site"}, status: http.StatusForbidden,
			check: func(t *testing.T, f *fixture) {
				if f.store.Unit("harrowmere-1").View().Alarms[alarm.Field].Acknowledged {
					t.Error("a cross-origin request acknowledged the alarm")
				}
			},
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			f := newFixture(t, nil)
			f.overField(t)
			r := f.do(t, http.MethodPost, tt.path, tt.form, tt.header)
			if r.status != tt.status {
				t.Fatalf("POST %s: %d, want %d: %s", tt.path, r.status, tt.status, r.body)
			}
			if tt.location != "" && r.header.Get("Location") != tt.location {
				t.Errorf("Location %q, want %q", r.header.Get("Location"), tt.location)
			}
			if tt.header["Accept"] == "application/json" {
				var res actionResult
				if err := json.Unmarshal([]byte(r.body), &res); err != nil {
					t.Fatalf("answer is not JSON: %v: %s", err, r.body)
				}
				if res.OK != (tt.status == http.StatusOK) || res.Message == "" {
					t.Errorf("answer %+v", res)
				}
			}
			if tt.check != nil {
				tt.check(t, f)
			}
		})
	}
}

// TestShelveAndUnshelve checks the whole round through the page: the
// alarm shows as shelved, the overview stops counting it, and unshelving
// brings it back.
func TestShelveAndUnshelve(t *testing.T) {
	f := newFixture(t, nil)
	f.overField(t)
	jsonAccept := map[string]string{"Accept": "application/json"}
	if r := f.do(t, http.MethodPost, "/units/harrowmere-1/alarms/field/shelve", url.Values{"duration": {"15m"}, "operator": {"night shift"}}, jsonAccept); r.status != http.StatusOK {
		t.Fatalf("shelve: %d %s", r.status, r.body)
	}
	p := f.get(t, "/units/harrowmere-1")
	wantContains(t, "unit page", p.body, "shelved until", "Unshelve")
	if d := f.ui.fleetData(); d.Rows[0].ID == "harrowmere-1" && d.Rows[0].Alarms.Highest.Level == alarm.Critical {
		t.Error("a shelved alarm still counts as the unit's highest level")
	}
	if r := f.do(t, http.MethodPost, "/units/harrowmere-1/alarms/field/unshelve", url.Values{"operator": {"night shift"}}, jsonAccept); r.status != http.StatusOK {
		t.Fatalf("unshelve: %d %s", r.status, r.body)
	}
	if m := f.store.Unit("harrowmere-1").View().Alarms[alarm.Field]; m.ShelvedUntil != 0 {
		t.Errorf("still shelved until %d", m.ShelvedUntil)
	}
}

func TestStatic(t *testing.T) {
	f := newFixture(t, nil)
	for name, u := range f.ui.assets {
		r := f.get(t, u)
		if r.status != http.StatusOK || r.body == "" {
			t.Errorf("GET %s: %d", u, r.status)
		}
		want := map[string]string{".css": "text/css", ".js": "javascript", ".svg": "image/svg+xml"}
		for ext, ct := range want {
			if strings.HasSuffix(name, ext) && !strings.Contains(r.header.Get("Content-Type"), ct) {
				t.Errorf("GET %s: Content-Type %q, want %s", u, r.header.Get("Content-Type"), ct)
			}
		}
	}
	for _, n := range []string{"app.css", "app.js", "icon.svg"} {
		if f.ui.assets[n] == "" {
			t.Errorf("asset %s missing", n)
		}
	}
}

// TestTrail checks that Run samples the operating points, keeps at most
// TrailLength of them, and ends with its context.
func TestTrail(t *testing.T) {
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	store := ingest.NewStore(fl, ingest.Options{})
	ui := New(store, Options{Logger: quietLog(), TrailLength: 3})
	now := time.Now()
	for i := range 5 {
		s := ingest.Sample{UnitID: "larchwater-2", Time: now.Add(time.Duration(i-10) * time.Second), PMW: float64(50 + i), QMvar: 5, VKV: 13.8}
		if res, d := store.Accept(now, &s); res != ingest.Accepted {
			t.Fatal(res, d)
		}
		ui.trails.sample(store)
		ui.trails.sample(store) // nothing new: no point added
	}
	pts, _ := ui.trails.get("larchwater-2")
	want := []chart.Point{{PMW: 52, QMvar: 5}, {PMW: 53, QMvar: 5}, {PMW: 54, QMvar: 5}}
	if len(pts) != len(want) {
		t.Fatalf("trail %v, want %v", pts, want)
	}
	for i := range want {
		if pts[i] != want[i] {
			t.Fatalf("trail %v, want %v", pts, want)
		}
	}
	if pts, _ := ui.trails.get("harrowmere-1"); len(pts) != 0 {
		t.Errorf("a unit without samples has a trail: %v", pts)
	}

	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan struct{})
	go func() { ui.Run(ctx); close(done) }()
	cancel()
	select {
	case <-done:
	case <-time.After(10 * time.Second):
		t.Fatal("Run did not end with its context")
	}
}

func TestFormat(t *testing.T) {
	nums := []struct {
		x    *float64
		dec  int
		want string
	}{
		{nil, 1, "—"}, {val(12.345), 1, "12.3"}, {val(-3.25), 2, "−3.25"}, {val(-0.01), 1, "0.0"},
	}
	for _, n := range nums {
		if got := fmtNum(n.x, n.dec).Text; got != n.want {
			t.Errorf("fmtNum(%v, %d) = %q, want %q", n.x, n.dec, got, n.want)
		}
	}
	ages := []struct {
		d    time.Duration
		want string
	}{
		{-time.Second, "0 s"}, {3 * time.Second, "3 s"}, {125 * time.Second, "2 min 05 s"}, {3*time.Hour + 7*time.Minute, "3 h 07 min"}, {50 * time.Hour, "2 d 02 h"},
	}
	for _, a := range ages {
		if got := fmtAge(a.d); got != a.want {
			t.Errorf("fmtAge(%s) = %q, want %q", a.d, got, a.want)
		}
	}
	ops := []struct{ in, want string }{
		{"", ""}, {"   ", ""}, {" A. Ruiz ", "A. Ruiz"}, {"a\x00b\nc", "abc"}, {strings.Repeat("x", 80), strings.Repeat("x", 64)},
	}
	for _, o := range ops {
		if got := operator(o.in); got != o.want {
			t.Errorf("operator(%q) = %q, want %q", o.in, got, o.want)
		}
	}
}
