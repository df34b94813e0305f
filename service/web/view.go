package web

import (
	"bytes"
	"fmt"
	"html/template"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/chart"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/report"
)

// level is how an alarm level is shown: never by colour alone, always
// with a shape and a word.
type level struct {
	Level alarm.Level
	Word  string // "critical", "warning", "normal"
	Icon  string // a shape that differs per level
	Class string // the stylesheet's class
}

func levelOf(l alarm.Level) level {
	switch l {
	case alarm.Critical:
		return level{l, "critical", "◆", "lvl-critical"}
	case alarm.Warning:
		return level{l, "warning", "▲", "lvl-warning"}
	}
	return level{alarm.Normal, "normal", "●", "lvl-normal"}
}

// num is a number as shown and as sorted; Sort is "" for a value that
// does not exist.
type num struct {
	Text string
	Sort string
}

const dash = "—"

// fmtNum formats x with dec decimals, a true minus sign, and "—" for a
// value that does not exist.
func fmtNum(x *float64, dec int) num {
	if x == nil || math.IsNaN(*x) || math.IsInf(*x, 0) {
		return num{Text: dash}
	}
	v := *x
	if math.Abs(v) < 0.5*math.Pow(10, -float64(dec)) {
		v = 0 // no "−0.0"
	}
	s := strconv.FormatFloat(v, 'f', dec, 64)
	return num{Text: strings.Replace(s, "-", "−", 1), Sort: strconv.FormatFloat(*x, 'g', 8, 64)}
}

func val(x float64) *float64 { return &x }

// fmtPct formats a ratio as a percentage.
func fmtPct(x *float64, dec int) num {
	if x == nil {
		return num{Text: dash}
	}
	n := fmtNum(val(100**x), dec)
	if n.Sort != "" {
		n.Text += " %"
		n.Sort = strconv.FormatFloat(*x, 'g', 8, 64)
	}
	return n
}

// fmtAge formats a duration in whole seconds, minutes and hours.
func fmtAge(d time.Duration) string {
	if d < 0 {
		d = 0
	}
	s := int64(d / time.Second)
	switch {
	case s < 120:
		return fmt.Sprintf("%d s", s)
	case s < 2*3600:
		return fmt.Sprintf("%d min %02d s", s/60, s%60)
	case s < 48*3600:
		return fmt.Sprintf("%d h %02d min", s/3600, s/60%60)
	}
	return fmt.Sprintf("%d d %02d h", s/86400, s/3600%24)
}

// fmtClock is a wall-clock time as shown on the pages.
func fmtClock(t time.Time) string { return t.Format("15:04:05 MST") }

// fmtWhen is a time with its date, as shown on the pages.
func fmtWhen(t time.Time) string { return t.Format("2006-01-02 15:04:05 MST") }

// limitName returns the operators' name of a limit given by its name
// (report's limit table).
func limitName(s *string) string {
	if s == nil {
		return dash
	}
	if li, ok := report.LimitNamed(*s); ok {
		return li.Title
	}
	return *s
}

// dataState is how fresh a unit's numbers are: never by colour alone.
type dataState struct {
	Word  string // "live", "stale", "no data"
	Class string // the stylesheet's class
}

var (
	stateLive   = dataState{"live", "st-live"}
	stateStale  = dataState{"stale", "st-stale"}
	stateNoData = dataState{"no data", "st-nodata"}
)

// stateOf returns the freshness of v as ingest judges it (View.Data): no
// data without an accepted sample, stale when no sample came within the
// unit's stale-telemetry warning threshold of wall-clock time.
func stateOf(v *ingest.View) dataState {
	switch v.Data {
	case ingest.NoData:
		return stateNoData
	case ingest.DataStale:
		return stateStale
	}
	return stateLive
}

// cause is why a unit is in alarm: its worst active alarm.
type cause struct {
	Kind    string // the alarm's name; "" for none
	Title   string
	Message string
	Level   level
}

// worstAlarm returns the kind of v's worst active alarm that is not
// shelved: the highest level, then not acknowledged, then the one raised
// first, then the kind's order. ok is false when none is active.
func worstAlarm(v *ingest.View, now time.Time) (k alarm.Kind, ok bool) {
	t := now.UnixNano()
	for i := range v.Alarms {
		m := &v.Alarms[i]
		if m.Level == alarm.Normal || m.Shelved(t) {
			continue
		}
		if ok {
			b := &v.Alarms[k]
			switch {
			case m.Level != b.Level:
				if m.Level < b.Level {
					continue
				}
			case m.Acknowledged != b.Acknowledged:
				if m.Acknowledged {
					continue
				}
			case m.Since >= b.Since:
				continue
			}
		}
		k, ok = alarm.Kind(i), true
	}
	return k, ok
}

// causeOf names the cause of unit v's state: its worst active alarm and
// that alarm's sentence, or no data.
func (ui *UI) causeOf(v *ingest.View, now time.Time) cause {
	k, ok := worstAlarm(v, now)
	if !ok {
		if !v.HasSample {
			return cause{Title: "No data", Message: "No sample received since the service started.", Level: levelOf(alarm.Normal)}
		}
		return cause{}
	}
	c := cause{Kind: k.String(), Title: report.AlarmTitle(k), Level: levelOf(v.Alarms[k].Level)}
	for _, ev := range ui.store.ActiveOf(v.Config.ID) {
		if ev.Kind == k {
			// The row names the unit already.
			c.Message = strings.TrimPrefix(ev.Message, v.Config.ID+": ")
		}
	}
	return c
}

// alarmSummary is the state of a unit's alarms at one wall-clock time.
type alarmSummary struct {
	Highest level // the highest level of the alarms not shelved
	Active  int   // alarms above normal, not shelved
	Unacked int   // of them, not acknowledged
	Shelved int   // alarms shelved
	ByKind  [alarm.NumKinds]level
}

func summarize(ms *[alarm.NumKinds]alarm.Machine, now time.Time) alarmSummary {
	var s alarmSummary
	t := now.UnixNano()
	for k := range ms {
		m := &ms[k]
		s.ByKind[k] = levelOf(m.Level)
		if m.Shelved(t) {
			s.Shelved++
			continue
		}
		if m.Level == alarm.Normal {
			continue
		}
		s.Active++
		if !m.Acknowledged {
			s.Unacked++
		}
		if m.Level > s.Highest.Level {
			s.Highest = levelOf(m.Level)
		}
	}
	if s.Highest.Word == "" {
		s.Highest = levelOf(alarm.Normal)
	}
	return s
}

// evaluation reports the view's latest sample in engineering units, or
// nil without one.
func evaluation(v *ingest.View) *report.Evaluation {
	if !v.HasSample {
		return nil
	}
	return report.New(v.Config, v.Point, &v.Eval) // the point as the engine evaluated it
}

// row is one unit in the fleet table.
type row struct {
	ID, Name, Site, Href string
	HasSample            bool
	State                dataState
	Questionable         bool // the latest sample's quality is QUESTIONABLE
	Feasible             bool // every bound exists (meaningful with a sample)
	Within               bool // inside every limit
	P, Q, V              num
	Up, Down             num
	UpLimit, DownLimit   string
	Binding              string
	BindingMargin        num
	BindingWord          string // "left" or "beyond"
	Alarms               alarmSummary
	Badge                level // the highest alarm level; "no data" or "stale" instead of normal
	Cause                cause
	Age                  num
	Rank                 int
}

// badgeOf is the badge a unit shows: its highest alarm level, except
// that a unit without fresh data is never shown as normal.
func badgeOf(a *alarmSummary, st dataState) level {
	if a.Highest.Level != alarm.Normal {
		return a.Highest
	}
	switch st {
	case stateNoData:
		return level{alarm.Normal, "no data", "○", "lvl-nodata"}
	case stateStale:
		return level{alarm.Normal, "stale", "◔", "lvl-stale"}
	}
	return a.Highest
}

// fleetData is what the overview shows.
type fleetData struct {
	Now      time.Time
	Rows     []row
	Units    int
	Critical int
	Warning  int
	NoData   int // units that never reported
	Stale    int // units whose telemetry is stale
	Outside  int // units outside their envelope
}

// worst returns the smallest capability margin of an evaluation, or +Inf.
func worst(ev *report.Evaluation) float64 {
	m := math.Inf(1)
	if ev.BindingLimit != nil {
		if b := ev.Margins[*ev.BindingLimit]; b != nil {
			m = *b
		}
	}
	return m
}

// marginStep is the resolution at which the overview orders units by
// margin: units whose margins differ by less keep their order by id, so
// rows do not swap on near-equal margins.
const marginStep = 0.01

// marginRank is margin m quantised to marginStep for the order.
func marginRank(m float64) float64 {
	if math.IsInf(m, 0) || math.IsNaN(m) {
		return m
	}
	return math.Floor(m / marginStep)
}

// stateRank orders the freshness within a level: fresh numbers first.
func stateRank(s dataState) int {
	switch s {
	case stateLive:
		return 0
	case stateStale:
		return 1
	}
	return 2
}

func (ui *UI) fleetData() *fleetData { return ui.fleetDataFor(nil) }

// fleetDataFor is the overview of the units keep admits (nil: all).
func (ui *UI) fleetDataFor(keep func(unitID string) bool) *fleetData {
	now := ui.opts.Now()
	units := ui.store.Units()
	d := &fleetData{Now: now, Units: len(units), Rows: make([]row, 0, len(units))}
	type ranked struct {
		r      row
		margin float64
	}
	rs := make([]ranked, 0, len(units))
	for _, u := range units {
		v := u.View()
		cfg := v.Config
		if keep != nil && !keep(cfg.ID) {
			d.Units--
			continue
		}
		r := row{ID: cfg.ID, Name: cfg.DisplayName(), Site: cfg.Site, Href: unitURL(cfg.ID), HasSample: v.HasSample,
			State: stateOf(&v), Alarms: summarize(&v.Alarms, now), Cause: ui.causeOf(&v, now)}
		r.Badge = badgeOf(&r.Alarms, r.State)
		margin := math.Inf(1)
		if ev := evaluation(&v); ev != nil {
			r.Questionable = v.Latest.Quality == ingest.QualityQuestionable
			r.P, r.Q, r.V = fmtNum(&ev.PMW, 1), fmtNum(&ev.QMvar, 1), fmtNum(&ev.VKV, 2)
			r.Up, r.Down = fmtNum(ev.QHeadroomUpMvar, 1), fmtNum(ev.QHeadroomDownMvar, 1)
			r.UpLimit, r.DownLimit = limitName(ev.QMaxLimit), limitName(ev.QMinLimit)
			r.Feasible, r.Within = ev.Feasible, ev.WithinLimits
			if ev.BindingLimit != nil {
				r.Binding = limitName(ev.BindingLimit)
				r.BindingMargin, r.BindingWord = fmtPct(ev.Margins[*ev.BindingLimit], 1), "left"
				if m := ev.Margins[*ev.BindingLimit]; m != nil && *m < 0 {
					r.BindingMargin, r.BindingWord = fmtPct(val(-*m), 1), "beyond"
				}
			}
			if !ev.Feasible {
				r.Binding = limitName(ev.InfeasibleLimit)
				r.BindingMargin = num{Text: "no bound", Sort: "-1e9"}
			}
			margin = worst(ev)
			if !ev.Feasible {
				margin = math.Inf(-1)
			}
			age := now.Sub(v.Received)
			r.Age = num{Text: fmtAge(age), Sort: strconv.FormatFloat(age.Seconds(), 'f', 3, 64)}
			if !ev.WithinLimits {
				d.Outside++
			}
		} else {
			r.P, r.Q, r.V, r.Up, r.Down, r.BindingMargin = num{Text: dash}, num{Text: dash}, num{Text: dash}, num{Text: dash}, num{Text: dash}, num{Text: dash}
			r.Binding, r.UpLimit, r.DownLimit = dash, "", ""
			r.Age = num{Text: "never", Sort: "1e18"}
		}
		switch r.Alarms.Highest.Level {
		case alarm.Critical:
			d.Critical++
		case alarm.Warning:
			d.Warning++
		}
		switch r.State {
		case stateNoData:
			d.NoData++
		case stateStale:
			d.Stale++
		}
		rs = append(rs, ranked{r, margin})
	}
	// Worst first: the highest alarm level; then fresh numbers before
	// stale ones and those before none; then the smallest margin, in
	// steps of marginStep; then the id. Near-equal margins keep their
	// order from one refresh to the next.
	sort.Slice(rs, func(i, j int) bool {
		a, b := &rs[i], &rs[j]
		if a.r.Alarms.Highest.Level != b.r.Alarms.Highest.Level {
			return a.r.Alarms.Highest.Level > b.r.Alarms.Highest.Level
		}
		if sa, sb := stateRank(a.r.State), stateRank(b.r.State); sa != sb {
			return sa < sb
		}
		if ma, mb := marginRank(a.margin), marginRank(b.margin); ma != mb {
			return ma < mb
		}
		return a.r.ID < b.r.ID
	})
	for i := range rs {
		rs[i].r.Rank = i
		d.Rows = append(d.Rows, rs[i].r)
	}
	return d
}

// unitData is what a unit page shows.
type unitData struct {
	Now          time.Time
	view         ingest.View
	Unit         *fleet.Unit
	Eval         *report.Evaluation // nil without a sample
	Alarms       alarmSummary
	Badge        level // see badgeOf
	AlarmRows    []alarmRow
	Trail        []chart.Point
	trailVersion uint64
	Age          string
	Chart        template.HTML
	Href         string

	// The sample, as shown.
	SampleTime    string
	Quality       string
	Questionable  bool      // the latest sample's quality is QUESTIONABLE: its numbers are marked
	State         dataState // live, stale or no data
	Rating        string
	AcceptedCount uint64
	// FieldReading is the field current the sample carried when the
	// engine did not use it ("" when it did, or when there is none), and
	// FieldUnused why.
	FieldReading, FieldUnused string

	Trend template.HTML // the headroom and margin trend, inline SVG

	Margins  []marginRow
	Thermal  []thermalRow
	Limiters []limiterRow // the regulator's OEL and SCL timers, those configured
	Headroom struct{ Up, Down, QMax, QMin num }

	User string // the signed-in identity, "" when none (see signIn)
}

// marginRow is one limit's margin.
type marginRow struct {
	Name, Title, Basis string
	Value              num
	Fill               int // 0..100, the bar's length
	Level              level
	Binding            bool
}

// thermalRow is one winding's short-time heating.
type thermalRow struct {
	Title    string
	Used     num
	Fill     int
	Current  num // pu of the continuous rating
	TimeLeft string
	Level    level
	Unknown  bool // the unit is stale: its thermal state is not known
}

// limiterRow is one inverse-time limiter's timer (OEL, SCL).
type limiterRow struct {
	Title   string
	Used    num // fraction of its delay used, 1 is the limiter acting
	Fill    int
	Current num    // the current it acts on, pu of its rating
	ActsIn  string // time to action at the present current; "" below pickup
	Timing  bool   // the current is above the pickup
	Level   level
	Unknown bool // the unit is stale
}

// alarmRow is one alarm on the unit page.
type alarmRow struct {
	Kind         string // the machine name, e.g. "field"
	Title        string
	Level        level
	Since        string
	Message      string
	Acknowledged bool
	Shelved      bool
	ShelvedUntil string
	Action       string // URL prefix of the alarm's POST endpoints
	CanAct       bool   // the signed-in identity may act on it (see signIn)
}

func (ui *UI) unitData(u *ingest.Unit) *unitData {
	now := ui.opts.Now()
	v := u.View()
	cfg := v.Config
	d := &unitData{Now: now, view: v, Unit: cfg, Eval: evaluation(&v), Alarms: summarize(&v.Alarms, now), Href: unitURL(cfg.ID),
		State: stateOf(&v)}
	d.Badge = badgeOf(&d.Alarms, d.State)
	d.Trail, d.trailVersion = ui.trails.get(cfg.ID)
	r := cfg.Rating
	d.Rating = fmt.Sprintf("%g MVA · %g kV · pf %g · %g Hz · %s rotor", r.MVA, r.KV, r.PowerFactor, r.FrequencyHz, cfg.Machine.Rotor)
	if r.Poles > 0 {
		d.Rating = fmt.Sprintf("%g MVA · %g kV · pf %g · %g Hz · %d poles · %s rotor", r.MVA, r.KV, r.PowerFactor, r.FrequencyHz, r.Poles, cfg.Machine.Rotor)
	}
	if ev := d.Eval; ev != nil {
		ev.SetRotorMode(cfg, v.Point) // an eigen decomposition: on this page only, not on the overview
		d.Age = fmtAge(now.Sub(v.Received))
		d.SampleTime = fmtWhen(v.Latest.Time)
		d.AcceptedCount = v.Accepted
		d.Quality = map[ingest.Quality]string{ingest.QualityGood: "good", ingest.QualityQuestionable: "questionable"}[v.Latest.Quality]
		d.Questionable = v.Latest.Quality == ingest.QualityQuestionable
		if v.Latest.HasFieldA && (!v.Point.IfdMeasured || v.Eval.FieldCurrent != v.Point.Ifd) {
			d.FieldReading = fmtNum(&v.Latest.FieldA, 0).Text + " A"
			d.FieldUnused = "not used: the model's field current counts"
			if d.Questionable {
				d.FieldUnused = "not used: the sample is QUESTIONABLE, so the larger of reading and model counts: the model's"
			}
		}
		d.Headroom.Up, d.Headroom.Down = fmtNum(ev.QHeadroomUpMvar, 1), fmtNum(ev.QHeadroomDownMvar, 1)
		d.Headroom.QMax, d.Headroom.QMin = fmtNum(ev.QMaxMvar, 1), fmtNum(ev.QMinMvar, 1)
		for _, l := range limits.Limits() {
			li := report.LimitOf(l)
			m := ev.Margins[li.Name]
			mr := marginRow{Name: li.Name, Title: li.Title, Basis: li.Basis, Value: fmtPct(m, 1),
				Binding: ev.BindingLimit != nil && *ev.BindingLimit == li.Name}
			if li.Alarm < alarm.NumKinds {
				mr.Level = d.Alarms.ByKind[li.Alarm]
			} else {
				mr.Level = levelOf(alarm.Normal)
			}
			if d.State == stateStale && mr.Level.Level == alarm.Normal {
				mr.Level = badgeOf(&alarmSummary{Highest: mr.Level}, stateStale) // old values: never "normal"
			}
			if l == limits.LimitStability {
				// Which limit this is: with the regulator in service or without.
				mr.Basis += map[string]string{"avr": " (avr basis: voltage regulator in service)", "manual": " (manual basis: constant field voltage)"}[ev.StabilityBasis]
				if m := ev.RotorMode; m != nil {
					mr.Basis += fmt.Sprintf("; rotor mode %.2f Hz, damping ratio %.3f", m.FrequencyHz, m.DampingRatio)
				}
			}
			if m != nil {
				mr.Fill = fill(*m)
			}
			d.Margins = append(d.Margins, mr)
		}
		for _, w := range []struct {
			title string
			t     limits.Thermal
			x, k  float64
			kind  alarm.Kind
		}{
			{"Armature winding", v.Armature, v.XArmature, limits.ArmatureK, alarm.ArmatureThermal},
			{"Field winding", v.Field, v.XField, limits.FieldK, alarm.FieldThermal},
		} {
			used := w.t.Used(w.k)
			tr := thermalRow{Title: w.title, Used: fmtPct(&used, 0), Fill: fill(used), Current: fmtNum(&w.x, 3), Level: d.Alarms.ByKind[w.kind]}
			if s, ok := w.t.TimeLeft(w.x, w.k); ok {
				tr.TimeLeft = fmtAge(time.Duration(s * float64(time.Second)))
			}
			if v.ThermalUnknown {
				// Stale: what the winding carries now is not known.
				tr.Used, tr.Fill, tr.TimeLeft, tr.Unknown = num{Text: "unknown (stale)"}, 0, "", true
				if tr.Level.Level == alarm.Normal {
					tr.Level = badgeOf(&alarmSummary{Highest: tr.Level}, stateStale)
				}
			}
			d.Thermal = append(d.Thermal, tr)
		}
		for _, l := range []struct {
			title string
			t     ingest.LimiterTimerView
			kind  alarm.Kind
		}{
			{"Overexcitation limiter (OEL)", v.Limiters.OEL, alarm.OELTimer},
			{"Stator current limiter (SCL)", v.Limiters.SCL, alarm.SCLTimer},
		} {
			if !l.t.Configured {
				continue
			}
			used := l.t.Used
			lr := limiterRow{Title: l.title, Used: fmtPct(&used, 0), Fill: fill(used), Current: fmtNum(&l.t.X, 3), Timing: l.t.Timing, Level: d.Alarms.ByKind[l.kind]}
			if l.t.Timing && !math.IsInf(l.t.ToActionS, 0) && !math.IsNaN(l.t.ToActionS) {
				lr.ActsIn = fmtAge(time.Duration(l.t.ToActionS * float64(time.Second)))
			}
			if v.ThermalUnknown {
				lr.Used, lr.Fill, lr.ActsIn, lr.Timing, lr.Unknown = num{Text: "unknown (stale)"}, 0, "", false, true
				if lr.Level.Level == alarm.Normal {
					lr.Level = badgeOf(&alarmSummary{Highest: lr.Level}, stateStale)
				}
			}
			d.Limiters = append(d.Limiters, lr)
		}
	}
	d.AlarmRows = ui.alarmRows(cfg.ID, &v, now)
	warn := math.NaN() // the warning threshold of the nearest limit's alarm
	if k := report.LimitOf(v.Eval.Binding).Alarm; v.HasSample && k < alarm.NumKinds {
		warn = cfg.Alarms[k].Warning
	}
	d.Trend = trendSVG(u.Trend(nil), cfg.Base.MVA, warn)
	return d
}

// fill is a ratio as a bar length in percent.
func fill(x float64) int {
	if math.IsNaN(x) {
		return 0
	}
	return int(math.Round(100 * math.Max(0, math.Min(1, x))))
}

// alarmRows returns unit id's active and shelved alarms, most severe
// first.
func (ui *UI) alarmRows(id string, v *ingest.View, now time.Time) []alarmRow {
	var rows []alarmRow
	msgs := map[alarm.Kind]alarm.Event{}
	for _, ev := range ui.store.ActiveOf(id) {
		msgs[ev.Kind] = ev
	}
	t := now.UnixNano()
	for k := range v.Alarms {
		m := &v.Alarms[k]
		kind := alarm.Kind(k)
		shelved := m.Shelved(t)
		if m.Level == alarm.Normal && !shelved {
			continue
		}
		r := alarmRow{Kind: kind.String(), Title: report.AlarmTitle(kind), Level: levelOf(m.Level), Acknowledged: m.Acknowledged,
			Shelved: shelved, Action: unitURL(id) + "/alarms/" + kind.String()}
		if m.Level != alarm.Normal {
			r.Since = fmtWhen(time.Unix(0, m.Since))
			if ev, ok := msgs[kind]; ok {
				r.Message = ev.Message
			}
		} else {
			r.Message = "Back to normal while shelved."
		}
		if shelved {
			r.ShelvedUntil = fmtClock(time.Unix(0, m.ShelvedUntil))
		}
		rows = append(rows, r)
	}
	sort.SliceStable(rows, func(i, j int) bool {
		a, b := &rows[i], &rows[j]
		if a.Shelved != b.Shelved {
			return !a.Shelved
		}
		return a.Level.Level > b.Level.Level
	})
	return rows
}

// drawChart draws the unit's capability chart at its present voltage and
// coolant, with the operating point and its trail.
func drawChart(d *unitData) (template.HTML, error) {
	cfg := d.Unit
	vPU, coolant, hasCoolant := 1.0, 0.0, false
	// The page's heading names the unit in full; the chart's title is
	// centred over the plot, so a long name is shortened to fit there.
	name := cfg.DisplayName()
	if r := []rune(name); len(r) > 32 {
		name = string(r[:31]) + "…"
	}
	title := fmt.Sprintf("%s · rated voltage %g kV", name, cfg.Rating.KV)
	opts := []chart.Option{chart.WithPrimeMover(cfg.PrimeMover.PMinMW, cfg.PrimeMover.PMaxMW),
		chart.WithSize(chartWidth, chartHeight)}
	if ev := d.Eval; ev != nil {
		vPU = ev.VPU
		title = fmt.Sprintf("%s · %.2f kV (%.3f pu)", name, ev.VKV, ev.VPU)
		if ev.Coolant != nil && cfg.Coolant != nil {
			coolant, hasCoolant = *ev.Coolant, true
			title += fmt.Sprintf(" · coolant %.1f %s", coolant, cfg.Coolant.Quantity.Unit())
		}
		if d.Questionable {
			title += " · QUESTIONABLE sample"
		}
		op := chart.Point{PMW: ev.PMW, QMvar: ev.QMvar}
		trail := d.Trail
		if n := len(trail); n == 0 || trail[n-1] != op {
			trail = append(trail, op)
		}
		opts = append(opts, chart.WithOperatingPoint(op), chart.WithTrail(trail))
	}
	var zones []limits.MhoZone
	if lof := cfg.Settings().LossOfField; lof != nil {
		zones = lof.Zones
	}
	opts = append(opts, chart.WithLimiters(nil, zones, vPU))
	pts := cfg.Model.Envelope(vPU, coolant, hasCoolant, 41)
	var buf bytes.Buffer
	if err := chart.Capability(&buf, title, pts, cfg.Base, opts...); err != nil {
		return "", err
	}
	svg := chart.Mark(buf.Bytes())
	if i := bytes.Index(svg, []byte("<svg")); i > 0 {
		svg = svg[i:] // inline in HTML: no XML prolog
	}
	// The SVG comes from our own drawing code, which escapes the texts it
	// draws (the unit's name among them).
	return template.HTML(svg), nil
}
