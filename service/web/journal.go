package web

import (
	"bytes"
	"errors"
	"fmt"
	"html/template"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/journal"
)

// journalPageSize is how many entries the journal page shows at once.
const journalPageSize = 100

// maxCSVEntries bounds one CSV download.
const maxCSVEntries = 100000

// journalData is what the journal page shows.
type journalData struct {
	Entries  []journal.Entry
	Units    []string
	Limits   []string
	Changes  []string
	Levels   []string
	Filter   journalForm
	NextHref string
	CSVHref  string
	Error    string
	NoJourn  bool
}

// journalForm is the page's filter as the form gives it.
type journalForm struct {
	Unit, Limit, Change, MinLevel, Operator string
}

// journalPage serves /journal: the alarm journal, newest first, a page
// at a time, filtered by unit, limit, change, level and operator; with
// ?format=csv, every matching entry as CSV.
func (ui *UI) journalPage(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	form := journalForm{Unit: q.Get("unit"), Limit: q.Get("limit"), Change: q.Get("change"), MinLevel: q.Get("min_level"), Operator: q.Get("operator")}
	d := &journalData{Filter: form, Changes: journal.Changes(), Levels: []string{"warning", "critical"}}
	scope := ui.opts.Scope(r)
	d.Units = ui.store.Fleet().IDs()
	if scope != nil {
		d.Units = slices.DeleteFunc(d.Units, func(id string) bool { return !scope(id) })
	}
	for _, k := range alarm.Kinds() {
		d.Limits = append(d.Limits, k.String())
	}
	p := ui.newPage("Alarm journal", "", d)
	j := ui.opts.Journal
	if j == nil {
		d.NoJourn = true
		ui.renderJournal(w, p)
		return
	}
	f := journal.Filter{MinLevel: form.MinLevel, Operator: form.Operator}
	if form.Unit != "" {
		f.Units = []string{form.Unit}
	}
	if scope != nil {
		// Only the scope's units, and no fleet-wide entries (denials name
		// other callers and units).
		if form.Unit == "" {
			f.Units = d.Units
		} else if !scope(form.Unit) {
			f.Units = nil
		}
		if len(f.Units) == 0 {
			f.Units = []string{"\x00"} // matches no unit
		}
	}
	if form.Limit != "" {
		f.Limits = []string{form.Limit}
	}
	if form.Change != "" {
		f.Changes = []string{form.Change}
	}
	if q.Get("format") == "csv" {
		ui.journalCSV(w, j, f)
		return
	}
	es, next, err := j.Query(f, journalPageSize, q.Get("page"))
	if err != nil {
		p.Status = http.StatusBadRequest
		if !errors.Is(err, journal.ErrBadFilter) && !errors.Is(err, journal.ErrBadToken) {
			ui.log.Error("journal not read", "err", err)
			p.Status = http.StatusInternalServerError
		}
		d.Error = err.Error()
		ui.renderJournal(w, p)
		return
	}
	d.Entries = es
	keep := url.Values{}
	for k, v := range map[string]string{"unit": form.Unit, "limit": form.Limit, "change": form.Change, "min_level": form.MinLevel, "operator": form.Operator} {
		if v != "" {
			keep.Set(k, v)
		}
	}
	if next != "" {
		nq := url.Values{}
		for k, v := range keep {
			nq[k] = v
		}
		nq.Set("page", next)
		d.NextHref = "/journal?" + nq.Encode()
	}
	keep.Set("format", "csv")
	d.CSVHref = "/journal?" + keep.Encode()
	ui.renderJournal(w, p)
}

// journalCSV writes every entry that matches f, newest first.
func (ui *UI) journalCSV(w http.ResponseWriter, j *journal.Journal, f journal.Filter) {
	all, more, err := j.Matching(f, maxCSVEntries)
	if err != nil {
		http.Error(w, "The journal could not be read: "+err.Error(), http.StatusBadRequest)
		return
	}
	if more {
		ui.log.Warn("journal CSV cut at its bound", "entries", maxCSVEntries)
	}
	w.Header().Set("Content-Type", "text/csv; charset=utf-8")
	w.Header().Set("Content-Disposition", fmt.Sprintf(`attachment; filename="genvelope-journal-%s.csv"`, ui.opts.Now().UTC().Format("20060102T150405Z")))
	if err := journal.WriteCSV(w, all); err != nil {
		ui.log.Warn("journal CSV not written", "err", err)
	}
}

// renderJournal writes the journal page. Its template is parsed here
// with the shared layout.
func (ui *UI) renderJournal(w http.ResponseWriter, p *page) {
	t, err := template.New("layout.html").Funcs(ui.funcs()).Funcs(template.FuncMap{
		"stamp": func(t time.Time) string { return t.UTC().Format("2006-01-02 15:04:05Z") },
		"seq":   func(n uint64) string { return strconv.FormatUint(n, 10) },
	}).ParseFS(templateFS, "templates/layout.html", "templates/parts.html", "templates/journal.html")
	if err != nil {
		ui.log.Error("journal page not parsed", "err", err)
		http.Error(w, "the page could not be rendered", http.StatusInternalServerError)
		return
	}
	var buf bytes.Buffer
	if err := t.ExecuteTemplate(&buf, "layout.html", p); err != nil {
		ui.log.Error("page not rendered", "page", "journal.html", "err", err)
		http.Error(w, "the page could not be rendered", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(p.Status)
	w.Write(buf.Bytes())
}
