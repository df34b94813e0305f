package web

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"html/template"
	"net/http"
	"net/url"
	"strings"
	"time"
	"unicode"

	"gonum.org/v1/plot/vg"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/report"
)

// The size the chart is drawn at; the page scales it to its column.
const (
	chartWidth  = 8.4 * vg.Inch
	chartHeight = 6 * vg.Inch
)

// Shelving bounds: an operator may shelve an alarm for a minute up to a
// day.
const (
	minShelve = time.Minute
	maxShelve = ingest.MaxShelve
)

// shelveChoices are the durations the unit page offers.
var shelveChoices = []struct{ Value, Label string }{
	{"15m", "15 min"}, {"1h", "1 hour"}, {"4h", "4 hours"}, {"8h", "8 hours"},
}

func unitURL(id string) string { return "/units/" + url.PathEscape(id) }

// page is what the layout needs besides the page's own data.
type page struct {
	Title    string
	Live     string // URL the script polls for fresh fragments; "" for none
	Refresh  int    // poll period, ms
	Caution  string
	Now      time.Time
	Fleet    string
	Data     any
	Status   int
	Message  string
	BackHref string
	User     string // the signed-in identity, "" when none
}

func (ui *UI) funcs() template.FuncMap {
	return template.FuncMap{
		"asset":   func(name string) string { return ui.assets[name] },
		"clock":   fmtClock,
		"when":    fmtWhen,
		"limit":   limitName,
		"num":     fmtNum,
		"pct":     fmtPct,
		"choices": func() any { return shelveChoices },
		"neg":     func(n num) bool { return strings.HasPrefix(n.Text, "−") },
		"dict": func(kv ...any) (map[string]any, error) {
			if len(kv)%2 != 0 {
				return nil, errors.New("dict: odd number of arguments")
			}
			m := make(map[string]any, len(kv)/2)
			for i := 0; i < len(kv); i += 2 {
				k, ok := kv[i].(string)
				if !ok {
					return nil, fmt.Errorf("dict: key %v is not a string", kv[i])
				}
				m[k] = kv[i+1]
			}
			return m, nil
		},
		"qsense": func(q float64) string {
			switch {
			case q > 0:
				return "overexcited · delivering"
			case q < 0:
				return "underexcited · absorbing"
			}
			return "unity power factor"
		},
		"coolantUnit": func(u *fleet.Unit) string {
			if u.Coolant == nil {
				return ""
			}
			return u.Coolant.Quantity.Unit()
		},
	}
}

func (ui *UI) newPage(title, live string, data any) *page {
	return &page{Title: title, Live: live, Refresh: int(ui.opts.RefreshEvery / time.Millisecond), Caution: fleet.Caution,
		Now: ui.opts.Now(), Fleet: ui.store.Fleet().File, Data: data, Status: http.StatusOK}
}

// render writes a whole page.
func (ui *UI) render(w http.ResponseWriter, name string, p *page) {
	var buf bytes.Buffer
	if err := ui.pages[name].ExecuteTemplate(&buf, "layout.html", p); err != nil {
		ui.log.Error("page not rendered", "page", name, "err", err)
		http.Error(w, "the page could not be rendered", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(p.Status)
	w.Write(buf.Bytes())
}

// fragments renders named templates of page name to strings.
func (ui *UI) fragments(name string, data any, parts ...string) (map[string]string, error) {
	out := make(map[string]string, len(parts))
	var buf bytes.Buffer
	for _, part := range parts {
		buf.Reset()
		if err := ui.pages[name].ExecuteTemplate(&buf, part, data); err != nil {
			return nil, fmt.Errorf("fragment %s: %w", part, err)
		}
		out[part] = buf.String()
	}
	return out, nil
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(status)
	enc := json.NewEncoder(w)
	enc.SetEscapeHTML(true)
	enc.Encode(v)
}

func (ui *UI) overview(w http.ResponseWriter, r *http.Request) {
	p := ui.newPage("Fleet", "/fleet/live", ui.fleetDataFor(ui.opts.Scope(r)))
	p.User, _ = ui.opts.Identity(r)
	ui.render(w, "overview.html", p)
}

// liveFleet is the overview's refresh: the table body and the summary.
type liveFleet struct {
	Time     time.Time         `json:"time"`
	Clock    string            `json:"clock"`
	Sections map[string]string `json:"sections"`
	Units    []liveRow         `json:"units"`
	Caution  string            `json:"caution"`
}

type liveRow struct {
	Unit  string `json:"unit"`
	Level string `json:"level"`
	Rank  int    `json:"rank"`
	State string `json:"state"` // "live", "stale" or "no data"
}

func (ui *UI) overviewLive(w http.ResponseWriter, r *http.Request) {
	d := ui.fleetDataFor(ui.opts.Scope(r))
	secs, err := ui.fragments("overview.html", d, "fleet-rows", "fleet-summary")
	if err != nil {
		ui.log.Error("overview fragments not rendered", "err", err)
		writeJSON(w, http.StatusInternalServerError, map[string]string{"error": "not rendered"})
		return
	}
	out := liveFleet{Time: d.Now, Clock: fmtClock(d.Now), Sections: secs, Caution: fleet.Caution}
	for _, row := range d.Rows {
		out.Units = append(out.Units, liveRow{Unit: row.ID, Level: row.Alarms.Highest.Word, Rank: row.Rank, State: row.State.Word})
	}
	writeJSON(w, http.StatusOK, out)
}

func (ui *UI) unitPage(w http.ResponseWriter, r *http.Request) {
	u := ui.unitOf(r)
	if u == nil {
		ui.notFound(w, r)
		return
	}
	d := ui.unitData(u)
	d.Chart = ui.unitChart(d)
	p := ui.newPage(d.Unit.DisplayName(), d.Href+"/live", d)
	p.User = ui.signIn(r, d)
	ui.render(w, "unit.html", p)
}

// liveUnit is the unit page's refresh.
type liveUnit struct {
	Unit         string             `json:"unit"`
	Time         time.Time          `json:"time"`
	Clock        string             `json:"clock"`
	Sections     map[string]string  `json:"sections"`
	Evaluation   *report.Evaluation `json:"evaluation"`   // null before the first sample
	State        string             `json:"state"`        // "live", "stale" or "no data"
	Questionable bool               `json:"questionable"` // the latest sample's quality is QUESTIONABLE
	Alarms       []liveAlarm        `json:"alarms"`
	Caution      string             `json:"caution"`
}

type liveAlarm struct {
	Kind         string `json:"kind"`
	Level        string `json:"level"`
	Acknowledged bool   `json:"acknowledged"`
	Shelved      bool   `json:"shelved"`
	Message      string `json:"message"`
}

func (ui *UI) unitLive(w http.ResponseWriter, r *http.Request) {
	u := ui.unitOf(r)
	if u == nil {
		writeJSON(w, http.StatusNotFound, map[string]string{"error": fmt.Sprintf("unit %q is not in the fleet", r.PathValue("id"))})
		return
	}
	d := ui.unitData(u)
	d.Chart = ui.unitChart(d)
	ui.signIn(r, d)
	secs, err := ui.fragments("unit.html", d, "unit-status", "unit-tiles", "unit-numbers", "unit-alarms", "unit-chart", "unit-trend")
	if err != nil {
		ui.log.Error("unit fragments not rendered", "unit", d.Unit.ID, "err", err)
		writeJSON(w, http.StatusInternalServerError, map[string]string{"error": "not rendered"})
		return
	}
	out := liveUnit{Unit: d.Unit.ID, Time: d.Now, Clock: fmtClock(d.Now), Sections: secs, Evaluation: d.Eval, Alarms: []liveAlarm{}, Caution: fleet.Caution,
		State: d.State.Word, Questionable: d.Questionable}
	for _, a := range d.AlarmRows {
		out.Alarms = append(out.Alarms, liveAlarm{Kind: a.Kind, Level: a.Level.Word, Acknowledged: a.Acknowledged, Shelved: a.Shelved, Message: a.Message})
	}
	writeJSON(w, http.StatusOK, out)
}

// actionResult is the JSON answer of an alarm action.
type actionResult struct {
	OK      bool   `json:"ok"`
	Message string `json:"message"`
}

func (ui *UI) alarmAction(w http.ResponseWriter, r *http.Request) {
	id, kindName, action := r.PathValue("id"), r.PathValue("kind"), r.PathValue("action")
	wantsJSON := strings.Contains(r.Header.Get("Accept"), "application/json")
	fail := func(status int, msg string) {
		if wantsJSON {
			writeJSON(w, status, actionResult{Message: msg})
			return
		}
		p := ui.newPage("Not done", "", nil)
		p.Status, p.Message, p.BackHref = status, msg, unitURL(id)
		if ui.unitOf(r) == nil {
			p.BackHref = "/"
		}
		ui.render(w, "notfound.html", p)
	}
	// A unit outside the request's scope is answered as one not in the
	// fleet, before anything else of the request is looked at.
	if ui.unitOf(r) == nil {
		fail(http.StatusNotFound, fmt.Sprintf("Unit %q is not in the fleet.", id))
		return
	}
	kind, ok := alarm.ParseKind(kindName)
	if !ok {
		fail(http.StatusNotFound, fmt.Sprintf("There is no alarm %q.", kindName))
		return
	}
	r.Body = http.MaxBytesReader(w, r.Body, 8<<10)
	if err := r.ParseForm(); err != nil {
		fail(http.StatusBadRequest, "The form could not be read.")
		return
	}
	by := operator(r.PostForm.Get("operator"))
	if name, _ := ui.opts.Identity(r); name != "" {
		by = name // the authenticated identity, not a typed name
	}
	if action != "acknowledge" && action != "shelve" && action != "unshelve" {
		fail(http.StatusNotFound, fmt.Sprintf("There is no alarm action %q: acknowledge, shelve or unshelve.", action))
		return
	}
	if by == "" {
		// The journal records who acted: without a signed-in identity the
		// operator gives a name.
		fail(http.StatusBadRequest, "Enter your name in the Operator box first: the journal records who acknowledged or shelved an alarm.")
		return
	}
	now := ui.opts.Now()
	var err error
	var done string
	switch action {
	case "acknowledge":
		err = ui.opts.Actions.Acknowledge(r.Context(), id, kind, now, by)
		done = fmt.Sprintf("%s: %s alarm acknowledged by %s.", id, report.AlarmTitle(kind), by)
	case "shelve":
		d, perr := time.ParseDuration(r.PostForm.Get("duration"))
		if perr != nil || d < minShelve || d > maxShelve {
			fail(http.StatusBadRequest, fmt.Sprintf("Shelve for a duration from %s to %s, for example 1h; got %q.", minShelve, maxShelve, r.PostForm.Get("duration")))
			return
		}
		until := now.Add(d)
		err = ui.opts.Actions.Shelve(r.Context(), id, kind, until, now, by)
		done = fmt.Sprintf("%s: %s alarm shelved until %s by %s.", id, report.AlarmTitle(kind), fmtClock(until), by)
	case "unshelve":
		err = ui.opts.Actions.Shelve(r.Context(), id, kind, time.Time{}, now, by)
		done = fmt.Sprintf("%s: %s alarm unshelved by %s.", id, report.AlarmTitle(kind), by)
	default:
		fail(http.StatusNotFound, fmt.Sprintf("There is no alarm action %q: acknowledge, shelve or unshelve.", action))
		return
	}
	switch {
	case errors.Is(err, ingest.ErrNotActive):
		fail(http.StatusConflict, fmt.Sprintf("The %s alarm of %s is not active: nothing to acknowledge.", report.AlarmTitle(kind), id))
		return
	case errors.Is(err, ingest.ErrUnknownUnit):
		fail(http.StatusNotFound, fmt.Sprintf("Unit %q is not in the fleet.", id))
		return
	case errors.Is(err, ingest.ErrUnavailable):
		fail(http.StatusServiceUnavailable, "The action could not be recorded (the log is unavailable); nothing was done. Try again.")
		return
	case err != nil:
		ui.log.Error("alarm action failed", "unit", id, "alarm", kind, "action", action, "err", err)
		fail(http.StatusInternalServerError, "The action failed.")
		return
	}
	ui.log.Info("alarm action", "unit", id, "alarm", kind.String(), "action", action, "operator", by)
	if wantsJSON {
		writeJSON(w, http.StatusOK, actionResult{OK: true, Message: done})
		return
	}
	http.Redirect(w, r, unitURL(id)+"#alarms", http.StatusSeeOther)
}

// operator returns the operator's name from a form field: printable,
// at most 64 characters; empty when none was given.
func operator(s string) string {
	s = strings.Map(func(r rune) rune {
		if unicode.IsPrint(r) {
			return r
		}
		return -1
	}, strings.TrimSpace(s))
	if rs := []rune(s); len(rs) > 64 {
		s = string(rs[:64])
	}
	return strings.TrimSpace(s)
}

// unitOf returns the unit the request's path names, or nil when there
// is none or it is outside the request's scope (answered alike).
func (ui *UI) unitOf(r *http.Request) *ingest.Unit {
	id := r.PathValue("id")
	if keep := ui.opts.Scope(r); keep != nil && !keep(id) {
		return nil
	}
	return ui.store.Unit(id)
}

func (ui *UI) notFound(w http.ResponseWriter, r *http.Request) {
	p := ui.newPage("Not found", "", nil)
	p.Status, p.BackHref = http.StatusNotFound, "/"
	if id := r.PathValue("id"); id != "" {
		p.Message = fmt.Sprintf("There is no unit %q in the fleet.", id)
	} else {
		p.Message = fmt.Sprintf("There is no page at %s.", r.URL.Path)
	}
	ui.render(w, "notfound.html", p)
}
