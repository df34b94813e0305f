// Package web serves genvelope's operator pages: the fleet overview at /,
// one page per unit at /units/{id} with its capability chart, numbers and
// alarms, and the endpoints behind them. The pages are rendered on the
// server with html/template; the stylesheet and the small script that
// sorts the table and refreshes the numbers every two seconds are
// embedded in the binary and served by it, so the pages work without any
// outside network.
//
// Routes (mounted at / on the service's HTTP listener):
//
//	GET  /                                      fleet overview
//	GET  /fleet/live                            overview fragments, JSON
//	GET  /units/{id}                            unit page
//	GET  /units/{id}/live                       unit page fragments and the evaluation, JSON
//	POST /units/{id}/alarms/{kind}/acknowledge  form field operator
//	POST /units/{id}/alarms/{kind}/shelve       form fields duration (e.g. 1h), operator
//	POST /units/{id}/alarms/{kind}/unshelve     form field operator
//	GET  /static/...                            stylesheet, script, icon
//
// The POST endpoints answer JSON to a request that accepts it, else they
// redirect back to the unit page; cross-origin browser requests are
// refused.
package web

import (
	"context"
	"crypto/sha256"
	"embed"
	"encoding/hex"
	"fmt"
	"html/template"
	"io/fs"
	"log/slog"
	"net/http"
	"path"
	"sync"
	"time"

	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/journal"
)

//go:embed templates/*.html
var templateFS embed.FS

//go:embed static
var staticFS embed.FS

// Options tune the pages. The zero value takes the defaults.
type Options struct {
	Logger *slog.Logger
	// Now is the wall clock, for telemetry age and shelving; default
	// time.Now.
	Now func() time.Time
	// TrailLength is how many recent operating points each unit's chart
	// shows; default 120.
	TrailLength int
	// TrailEvery is how often Run samples the operating points; default
	// 1 s.
	TrailEvery time.Duration
	// RefreshEvery is how often the pages ask for fresh numbers; default
	// 2 s.
	RefreshEvery time.Duration
	// Identity, when set, returns who a request comes from ("" when
	// unknown: the typed operator name is recorded) and whether they may
	// act on a unit's alarms (the pages hide the actions they may not
	// take). Nil: anonymous, and everyone may act.
	Identity func(r *http.Request) (name string, mayOperate func(unitID string) bool)
	// Scope, when set, returns which units a request may see (nil: all).
	// The overview, its refresh and the journal show only those; a unit
	// page outside the scope is refused before it gets here.
	Scope   func(r *http.Request) (mayView func(unitID string) bool)
	Journal *journal.Journal // the alarm journal for /journal; nil when none is kept
	// Actions apply acknowledgements and shelves; default the store
	// itself (a replicated service passes its log).
	Actions ingest.Actions
}

func (o Options) withDefaults() Options {
	if o.Logger == nil {
		o.Logger = slog.Default()
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.TrailLength <= 0 {
		o.TrailLength = 120
	}
	if o.TrailEvery <= 0 {
		o.TrailEvery = time.Second
	}
	if o.RefreshEvery <= 0 {
		o.RefreshEvery = 2 * time.Second
	}
	if o.Identity == nil {
		o.Identity = func(*http.Request) (string, func(string) bool) { return "", func(string) bool { return true } }
	}
	if o.Scope == nil {
		o.Scope = func(*http.Request) func(string) bool { return nil }
	}
	return o
}

// UI is the web interface over one store. It is an http.Handler; Run
// keeps the operating-point trails.
type UI struct {
	store   *ingest.Store
	opts    Options
	log     *slog.Logger
	pages   map[string]*template.Template
	assets  map[string]string // file name -> URL with a content version
	handler http.Handler

	trails trails

	chartMu sync.Mutex
	charts  map[string]cachedChart // by unit id
}

// cachedChart is a unit's last chart and what it was drawn from.
type cachedChart struct {
	key chartKey
	svg template.HTML
}

// New returns the web interface over store.
func New(store *ingest.Store, opts Options) *UI {
	opts = opts.withDefaults()
	if opts.Actions == nil {
		opts.Actions = ingest.StoreActions{Store: store}
	}
	ui := &UI{store: store, opts: opts, log: opts.Logger, charts: map[string]cachedChart{}}
	ui.trails.init(opts.TrailLength)
	ui.assets = assetURLs()
	ui.pages = parsePages(ui.funcs())

	mux := http.NewServeMux()
	static, err := fs.Sub(staticFS, "static")
	if err != nil {
		panic(err) // the embedded tree is fixed at build time
	}
	files := http.StripPrefix("/static/", http.FileServerFS(static))
	mux.Handle("GET /static/", http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		// The URLs carry a content version (see assetURLs), so a long
		// cache life is safe.
		w.Header().Set("Cache-Control", "public, max-age=86400")
		files.ServeHTTP(w, r)
	}))
	mux.HandleFunc("GET /{$}", ui.overview)
	mux.HandleFunc("GET /fleet/live", ui.overviewLive)
	mux.HandleFunc("GET /units/{id}", ui.unitPage)
	mux.HandleFunc("GET /units/{id}/live", ui.unitLive)
	mux.HandleFunc("POST /units/{id}/alarms/{kind}/{action}", ui.alarmAction)
	mux.HandleFunc("GET /journal", ui.journalPage)
	mux.HandleFunc("/", ui.notFound)
	ui.handler = http.NewCrossOriginProtection().Handler(securityHeaders(mux))
	return ui
}

// ServeHTTP serves the pages.
func (ui *UI) ServeHTTP(w http.ResponseWriter, r *http.Request) { ui.handler.ServeHTTP(w, r) }

// Run samples every unit's operating point each TrailEvery for the
// charts' trails, until ctx is done. It reads the store as any reader
// does and never holds up ingest.
func (ui *UI) Run(ctx context.Context) {
	t := time.NewTicker(ui.opts.TrailEvery)
	defer t.Stop()
	ui.trails.sample(ui.store)
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
			ui.trails.sample(ui.store)
		}
	}
}

// securityHeaders keeps the pages to their own scripts and styles. The
// charts' SVG carries style attributes, hence 'unsafe-inline' for styles
// only; no inline script runs.
func securityHeaders(h http.Handler) http.Handler {
	const csp = "default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; img-src 'self' data:; " +
		"connect-src 'self'; form-action 'self'; base-uri 'none'; frame-ancestors 'none'"
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		hd := w.Header()
		hd.Set("Content-Security-Policy", csp)
		hd.Set("X-Content-Type-Options", "nosniff")
		hd.Set("Referrer-Policy", "same-origin")
		h.ServeHTTP(w, r)
	})
}

// assetURLs returns the URL of every embedded static file, with a short
// hash of its content as a version.
func assetURLs() map[string]string {
	out := map[string]string{}
	err := fs.WalkDir(staticFS, "static", func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		b, err := staticFS.ReadFile(p)
		if err != nil {
			return err
		}
		sum := sha256.Sum256(b)
		name := path.Base(p)
		out[name] = fmt.Sprintf("/static/%s?v=%s", name, hex.EncodeToString(sum[:6]))
		return nil
	})
	if err != nil {
		panic(err) // the embedded tree is fixed at build time
	}
	return out
}

// parsePages parses every page template with the shared layout.
func parsePages(funcs template.FuncMap) map[string]*template.Template {
	base := template.Must(template.New("layout.html").Funcs(funcs).ParseFS(templateFS, "templates/layout.html", "templates/parts.html"))
	pages := map[string]*template.Template{}
	for _, name := range []string{"overview.html", "unit.html", "notfound.html"} {
		pages[name] = template.Must(template.Must(base.Clone()).ParseFS(templateFS, "templates/"+name))
	}
	return pages
}

// unitChart returns the unit's capability chart, drawn again only when
// the unit's state or trail changed since the last one.
func (ui *UI) unitChart(d *unitData) template.HTML {
	key := chartKey{cfg: d.view.Config, accepted: d.view.Accepted, trail: d.trailVersion}
	id := d.view.Config.ID
	ui.chartMu.Lock()
	c, ok := ui.charts[id]
	ui.chartMu.Unlock()
	if ok && c.key == key {
		return c.svg
	}
	svg, err := drawChart(d)
	if err != nil {
		ui.log.Error("capability chart not drawn", "unit", id, "err", err)
		return template.HTML(`<p class="chart-missing">The capability chart could not be drawn: ` + template.HTMLEscapeString(err.Error()) + `</p>`)
	}
	ui.chartMu.Lock()
	if len(ui.charts) > 4*len(ui.store.Units())+16 {
		clear(ui.charts) // units dropped by reloads
	}
	ui.charts[id] = cachedChart{key: key, svg: svg}
	ui.chartMu.Unlock()
	return svg
}

// chartKey is what a unit's chart is drawn from.
type chartKey struct {
	cfg      *fleet.Unit // a reload gives new parameters
	accepted uint64
	trail    uint64
}
