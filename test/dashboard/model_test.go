package dashboard

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/test/testenv"

	"github.com/genvelope/genvelope/service/fleet"
)

// dashboardFile is the dashboard under test, from the module root.
var dashboardFile = filepath.Join("deploy", "grafana", "genvelope-fleet.json")

// The parts of Grafana's dashboard JSON model the tests read.
type dashboard struct {
	UID           string  `json:"uid"`
	Title         string  `json:"title"`
	Description   string  `json:"description"`
	SchemaVersion int     `json:"schemaVersion"`
	Panels        []panel `json:"panels"`
	Templating    struct {
		List []variable `json:"list"`
	} `json:"templating"`
}

type dsRef struct {
	Type string `json:"type"`
	UID  string `json:"uid"`
}

type panel struct {
	ID          int      `json:"id"`
	Type        string   `json:"type"`
	Title       string   `json:"title"`
	Description string   `json:"description"`
	Datasource  *dsRef   `json:"datasource"`
	Repeat      string   `json:"repeat"`
	GridPos     gridPos  `json:"gridPos"`
	Targets     []target `json:"targets"`
	Panels      []panel  `json:"panels"` // a collapsed row's panels
	Options     struct {
		Content string `json:"content"` // text panels
	} `json:"options"`
}

type gridPos struct{ H, W, X, Y int }

type target struct {
	RefID      string `json:"refId"`
	Expr       string `json:"expr"`
	Instant    bool   `json:"instant"`
	Range      bool   `json:"range"`
	Hide       bool   `json:"hide"`
	Datasource *dsRef `json:"datasource"`
}

type variable struct {
	Name       string          `json:"name"`
	Type       string          `json:"type"`
	Query      json.RawMessage `json:"query"` // a string, or {"query": "..."} in newer models
	Definition string          `json:"definition"`
	IncludeAll bool            `json:"includeAll"`
	AllValue   *string         `json:"allValue"`
	Multi      bool            `json:"multi"`
	Datasource *dsRef          `json:"datasource"`
}

// queryText returns the variable's query, whichever form the model uses.
func (v variable) queryText() string {
	var s string
	if json.Unmarshal(v.Query, &s) == nil {
		return s
	}
	var o struct {
		Query string `json:"query"`
	}
	if json.Unmarshal(v.Query, &o) == nil && o.Query != "" {
		return o.Query
	}
	return v.Definition
}

// where names a panel target in failure messages.
func (p panel) where(tg target) string {
	return fmt.Sprintf("panel %q (id %d, %s) target %s", p.Title, p.ID, p.Type, tg.RefID)
}

// loadDashboard reads and parses the dashboard.
func loadDashboard(t *testing.T, root string) *dashboard {
	t.Helper()
	path := filepath.Join(root, dashboardFile)
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var d dashboard
	if err := json.Unmarshal(data, &d); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return &d
}

// allPanels returns every panel, those inside collapsed rows included.
func allPanels(d *dashboard) []panel {
	var out []panel
	var walk func([]panel)
	walk = func(ps []panel) {
		for _, p := range ps {
			out = append(out, p)
			walk(p.Panels)
		}
	}
	walk(d.Panels)
	return out
}

// Grafana's built-in interval variables, as the tests substitute them:
// the live test scrapes every second, so a minute holds many samples.
var builtins = map[string]string{
	"__rate_interval": "1m",
	"__interval":      "15s",
	"__interval_ms":   "15000",
	"__range":         "5m",
	"__range_s":       "300",
	"__range_ms":      "300000",
}

// varRef matches Grafana's variable syntaxes: $name, ${name}, ${name:fmt}
// and [[name]].
var varRef = regexp.MustCompile(`\$\{(\w+)(?::[^}]*)?\}|\[\[(\w+)\]\]|\$(\w+)`)

// substitute replaces every variable in expr with its value in vals or
// the built-ins. A reference to a variable that exists in neither is an
// error; $1 and the like (label_replace replacements) are left alone.
func substitute(expr string, vals map[string]string) (string, error) {
	var unknown []string
	out := varRef.ReplaceAllStringFunc(expr, func(m string) string {
		sub := varRef.FindStringSubmatch(m)
		name := sub[1] + sub[2] + sub[3]
		if v, ok := builtins[name]; ok {
			return v
		}
		if v, ok := vals[name]; ok {
			return v
		}
		if regexp.MustCompile(`^\d+$`).MatchString(name) {
			return m
		}
		unknown = append(unknown, m)
		return m
	})
	if len(unknown) > 0 {
		return "", fmt.Errorf("unknown template variable %s", strings.Join(unknown, ", "))
	}
	return out, nil
}

// labelValuesQuery matches the variable queries the dashboard may use:
// label_values(selector, label) and label_values(label).
var labelValuesQuery = regexp.MustCompile(`^\s*label_values\(\s*(?:(.+?)\s*,\s*)?(\w+)\s*\)\s*$`)

// The metrics the dashboard must show, one panel query at least for each.
var requiredMetrics = []string{
	"genvelope_reactive_headroom_vars",
	"genvelope_limit_margin_ratio",
	"genvelope_binding_limit",
	"genvelope_alarm_level",
	"genvelope_thermal_capacity_used_ratio",
	"genvelope_telemetry_age_seconds",
	"genvelope_samples_total",
	"genvelope_fleet_reload_success",
	"genvelope_fleet_units",
}

// The dashboard's JSON model has the shape Grafana needs and the
// operators were promised: a Prometheus data source variable every query
// uses, site and unit variables from genvelope_unit_info, every panel
// titled and described, unique ids on a 24-column grid, every template
// reference known, the required metrics shown, and the caution sentence
// on the dashboard and in its README.
func TestDashboardModel(t *testing.T) {
	root := testenv.ModuleRoot(t)
	d := loadDashboard(t, root)
	if d.UID == "" || d.Title == "" {
		t.Errorf("uid %q, title %q: both must be set", d.UID, d.Title)
	}
	if d.SchemaVersion < 36 {
		t.Errorf("schemaVersion %d, want 36 or later (datasource references by uid)", d.SchemaVersion)
	}

	vars := map[string]variable{}
	vals := map[string]string{}
	for _, v := range d.Templating.List {
		if _, dup := vars[v.Name]; dup {
			t.Errorf("template variable %q defined twice", v.Name)
		}
		vars[v.Name] = v
		vals[v.Name] = ".*"
		if v.Type != "query" {
			continue
		}
		if v.Datasource == nil || v.Datasource.UID != "${datasource}" {
			t.Errorf("variable %q: datasource %+v, want uid ${datasource}", v.Name, v.Datasource)
		}
		if !labelValuesQuery.MatchString(v.queryText()) {
			t.Errorf("variable %q: query %q is not label_values(...), which the live test knows how to run", v.Name, v.queryText())
		}
		if v.IncludeAll && (v.AllValue == nil || *v.AllValue != ".*") {
			t.Errorf("variable %q: includeAll with allValue %v; want \".*\", so All also matches units without a site and new units", v.Name, v.AllValue)
		}
	}
	if ds, ok := vars["datasource"]; !ok || ds.Type != "datasource" || string(ds.Query) != `"prometheus"` {
		t.Errorf("no datasource variable of type datasource, query prometheus: %+v", ds)
	}
	for _, name := range []string{"site", "unit"} {
		v, ok := vars[name]
		if !ok {
			t.Errorf("no %q template variable", name)
			continue
		}
		m := labelValuesQuery.FindStringSubmatch(v.queryText())
		if m == nil || !strings.HasPrefix(m[1], "genvelope_unit_info") || m[2] != name {
			t.Errorf("variable %q: query %q, want label_values(genvelope_unit_info..., %s)", name, v.queryText(), name)
		}
	}
	if q := vars["unit"].queryText(); !strings.Contains(q, "$site") {
		t.Errorf("variable unit: query %q does not follow the site selection ($site)", q)
	}

	ids := map[int]string{}
	shown := map[string]bool{}
	caution := false
	nTargets := 0
	for _, p := range allPanels(d) {
		if prev, dup := ids[p.ID]; dup {
			t.Errorf("panel id %d used by %q and %q", p.ID, prev, p.Title)
		}
		ids[p.ID] = p.Title
		g := p.GridPos
		if g.W <= 0 || g.H <= 0 || g.X < 0 || g.Y < 0 || g.X+g.W > 24 {
			t.Errorf("panel %q: gridPos %+v is off the 24-column grid", p.Title, g)
		}
		if p.Type == "row" {
			continue
		}
		if p.Title == "" || len(p.Description) < 20 {
			t.Errorf("panel id %d %q: needs a title and a description in plain words (description %q)", p.ID, p.Title, p.Description)
		}
		if strings.Contains(p.Options.Content, fleet.Caution) {
			caution = true
		}
		if p.Type == "text" {
			continue
		}
		if p.Repeat != "" && vars[p.Repeat].Name == "" {
			t.Errorf("panel %q repeats over unknown variable %q", p.Title, p.Repeat)
		}
		if p.Datasource == nil || p.Datasource.UID != "${datasource}" {
			t.Errorf("panel %q: datasource %+v, want uid ${datasource}", p.Title, p.Datasource)
		}
		if len(p.Targets) == 0 {
			t.Errorf("panel %q has no queries", p.Title)
		}
		refs := map[string]bool{}
		for _, tg := range p.Targets {
			nTargets++
			if refs[tg.RefID] || tg.RefID == "" {
				t.Errorf("%s: refId empty or used twice", p.where(tg))
			}
			refs[tg.RefID] = true
			if tg.Datasource != nil && tg.Datasource.UID != "${datasource}" {
				t.Errorf("%s: datasource %+v, want uid ${datasource}", p.where(tg), tg.Datasource)
			}
			if strings.TrimSpace(tg.Expr) == "" {
				t.Errorf("%s: empty expr", p.where(tg))
			}
			if !tg.Instant && !tg.Range {
				t.Errorf("%s: neither instant nor range", p.where(tg))
			}
			if _, err := substitute(tg.Expr, vals); err != nil {
				t.Errorf("%s: %v in %s", p.where(tg), err, tg.Expr)
			}
			for _, m := range requiredMetrics {
				if regexp.MustCompile(`\b` + m + `\b`).MatchString(tg.Expr) {
					shown[m] = true
				}
			}
		}
	}
	for _, v := range d.Templating.List {
		if v.Type == "query" {
			if _, err := substitute(v.queryText(), vals); err != nil {
				t.Errorf("variable %q: %v in %s", v.Name, err, v.queryText())
			}
		}
	}
	var missing []string
	for _, m := range requiredMetrics {
		if !shown[m] {
			missing = append(missing, m)
		}
	}
	sort.Strings(missing)
	if len(missing) > 0 {
		t.Errorf("no panel query uses %s", strings.Join(missing, ", "))
	}
	if !caution {
		t.Errorf("no text panel carries the caution sentence %q", fleet.Caution)
	}
	readme, err := os.ReadFile(filepath.Join(root, "deploy", "grafana", "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	// The sentence may be wrapped, and inside a block quote.
	text := regexp.MustCompile(`(?m)^\s*>`).ReplaceAllString(string(readme), "")
	if !strings.Contains(strings.Join(strings.Fields(text), " "), fleet.Caution) {
		t.Errorf("deploy/grafana/README.md does not carry the caution sentence %q", fleet.Caution)
	}
	t.Logf("%d panels, %d queries, %d template variables", len(ids), nTargets, len(vars))
}

func TestSubstitute(t *testing.T) {
	vals := map[string]string{"site": ".*", "unit": "harrowmere-1"}
	for _, c := range []struct{ in, want, err string }{
		{`x{site=~"$site", unit=~"${unit}"}`, `x{site=~".*", unit=~"harrowmere-1"}`, ""},
		{`rate(x[$__rate_interval])`, `rate(x[1m])`, ""},
		{`increase(x[$__range]) / $__range_s`, `increase(x[5m]) / 300`, ""},
		{`x{unit=~"[[unit]]", site=~"${site:regex}"}`, `x{unit=~"harrowmere-1", site=~".*"}`, ""},
		{`label_replace(x, "a", "$1", "b", "(.*)")`, `label_replace(x, "a", "$1", "b", "(.*)")`, ""},
		{`x{unit=~"$nosuch"}`, "", "unknown template variable $nosuch"},
	} {
		got, err := substitute(c.in, vals)
		if c.err != "" {
			if err == nil || err.Error() != c.err {
				t.Errorf("substitute(%q): error %v, want %q", c.in, err, c.err)
			}
			continue
		}
		if err != nil || got != c.want {
			t.Errorf("substitute(%q) = %q, %v; want %q", c.in, got, err, c.want)
		}
	}
}
