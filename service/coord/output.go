package coord

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"html/template"
	"io"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/chart"
	"github.com/genvelope/genvelope/service/fleet"
)

// WriteJSON writes the report in the JSON shape of coordination.md.
func (r *Report) WriteJSON(w io.Writer) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(r)
}

// WriteText writes the report as plain text, one table per unit, and the
// caution.
func (r *Report) WriteText(w io.Writer) error {
	var b bytes.Buffer
	for i, u := range r.Units {
		if i > 0 {
			b.WriteString("\n")
		}
		fmt.Fprintf(&b, "unit %s\n", u.Unit)
		tw := tabwriter.NewWriter(&b, 0, 4, 2, ' ', 0)
		fmt.Fprintln(tw, "  check\tstatus\tmargin\tworst\tdetail")
		for _, c := range u.Checks {
			fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\t%s\n", c.Name, c.Status, c.marginText(), c.worstText(), c.Detail)
		}
		if err := tw.Flush(); err != nil {
			return err
		}
		for _, z := range zoneLines(&u) {
			fmt.Fprintf(&b, "  %s\n", z)
		}
	}
	fmt.Fprintf(&b, "\n%s\n", fleet.Caution)
	_, err := w.Write(b.Bytes())
	return err
}

func (c Check) marginText() string {
	if c.Margin == nil {
		return "-"
	}
	switch c.MarginUnit {
	case "Mvar":
		return fmt.Sprintf("%+.1f Mvar", *c.Margin)
	case "ratio":
		return fmt.Sprintf("%+.3f", *c.Margin)
	}
	return fmt.Sprintf("%+.3f pu", *c.Margin)
}

func (c Check) worstText() string {
	if c.Worst == nil {
		return "-"
	}
	return fmt.Sprintf("%.2f pu, %.1f MW", c.Worst.VPU, c.Worst.PMW)
}

// Source is what the HTML report says about where it comes from.
type Source struct {
	FleetFile string    // the path given
	Data      []byte    // the file's content, for its hash
	At        time.Time // when the study ran
}

// WriteHTML writes the report as one self-contained printable HTML page:
// a summary table, and per unit its checks, the P-Q charts at 0.95, 1.00
// and 1.05 pu, the R-X, time-current and V/Hz charts, and the inputs
// used; the caution, the date and the fleet file's SHA-256.
func (r *Report) WriteHTML(w io.Writer, src Source) error {
	sum := sha256.Sum256(src.Data)
	page := htmlPage{
		File: src.FleetFile, Hash: hex.EncodeToString(sum[:]), At: src.At.UTC().Format("2006-01-02 15:04:05 UTC"),
		Caution: fleet.Caution, Names: limits.CheckNames(),
	}
	for _, u := range r.Units {
		hu, err := htmlUnitOf(&u)
		if err != nil {
			return fmt.Errorf("unit %s: %w", u.Unit, err)
		}
		page.Units = append(page.Units, hu)
	}
	return htmlTemplate.Execute(w, page)
}

type htmlPage struct {
	File, Hash, At, Caution string
	Names                   [limits.NumChecks]string
	Units                   []htmlUnit
}

type htmlUnit struct {
	ID, Name, Site, Basis string
	Failed                bool
	Checks                []Check
	Zone2                 []string
	Charts                []htmlChart
	Inputs                [][2]string
}

type htmlChart struct {
	Kind string // "pq", "rx", "time", "vhz"
	SVG  template.HTML
}

func htmlUnitOf(u *Unit) (htmlUnit, error) {
	fu := u.fu
	m := fu.Model
	hu := htmlUnit{ID: fu.ID, Name: fu.DisplayName(), Site: fu.Site, Basis: m.Params().Basis.String(), Failed: u.Failed(), Checks: u.Checks}
	hu.Zone2 = zoneLines(u)
	draw := func(kind string, f func(w io.Writer) error) error {
		var b bytes.Buffer
		if err := f(&b); err != nil {
			return err
		}
		svg := b.String()
		if i := strings.Index(svg, "<svg"); i > 0 {
			svg = svg[i:] // drop the XML prologue inside HTML
		}
		hu.Charts = append(hu.Charts, htmlChart{Kind: kind, SVG: template.HTML(svg)}) // #nosec: our own SVG
		return nil
	}
	for _, v := range limits.StudyVoltages() {
		title := fmt.Sprintf("%s: P-Q at %.2f pu (%.2f kV)", fu.ID, v, fu.Base.VoltageKV(v))
		if err := draw("pq", func(w io.Writer) error { return chart.CoordPQ(w, title, m, &u.set, &u.study, fu.Base, v) }); err != nil {
			return hu, err
		}
	}
	if err := draw("rx", func(w io.Writer) error {
		return chart.CoordRX(w, fu.ID+": R-X, loss-of-field relay", m, &u.set, fu.Base)
	}); err != nil {
		return hu, err
	}
	if err := draw("time", func(w io.Writer) error { return chart.CoordTime(w, fu.ID+": time-current", &u.set) }); err != nil {
		return hu, err
	}
	if err := draw("vhz", func(w io.Writer) error { return chart.CoordVHz(w, fu.ID+": volts per hertz", &u.set) }); err != nil {
		return hu, err
	}
	hu.Inputs = inputs(fu, &u.set)
	return hu, nil
}

// zoneLines reports the loss-of-field zones' P-Q images at each study
// voltage and where the manual stability limit lies inside zone 2
// (coordination.md: reported, not a check).
func zoneLines(u *Unit) []string {
	l := u.set.LossOfField
	if l == nil {
		return nil
	}
	mva := u.fu.Base.MVA
	var out []string
	for k, v := range limits.StudyVoltages() {
		var imgs []string
		for i, z := range l.Zones {
			cq, r := limits.MhoPQ(z.Offset, z.Diameter, v)
			imgs = append(imgs, fmt.Sprintf("zone %d circle centre %.1f Mvar, radius %.1f Mvar, top %.1f Mvar at 0 MW", i+1, cq*mva, r*mva, (cq+r)*mva))
		}
		line := fmt.Sprintf("at %.2f pu: %s", v, strings.Join(imgs, "; "))
		if len(l.Zones) >= 2 {
			if z := u.study.Zone2OverStability[k]; z.OK {
				line += fmt.Sprintf("; the manual stability limit lies inside zone 2 from %.1f to %.1f MW", z.PLo*mva, z.PHi*mva)
			} else {
				line += "; the manual stability limit lies nowhere inside zone 2"
			}
		}
		out = append(out, line)
	}
	return out
}

// inputs lists what the study used, in the file's units.
func inputs(fu *fleet.Unit, s *limits.Settings) [][2]string {
	p := fu.Model.Params()
	b := fu.Base
	rows := [][2]string{
		{"rating", fmt.Sprintf("%g MVA, %g kV, power factor %g", fu.Rating.MVA, fu.Rating.KV, fu.Rating.PowerFactor)},
		{"machine", fmt.Sprintf("%s rotor, xd %g, xq %g, xd' %g pu", p.Rotor, p.Xd, p.Xq, p.XdTransient)},
		{"grid", fmt.Sprintf("x_external %g pu; stability basis %s", p.Xe, p.Basis)},
		{"prime mover", fmt.Sprintf("p_max %g MW", fu.PrimeMover.PMaxMW)},
	}
	if u := p.UEL; u != nil {
		if u.Shape == limits.UELCircle {
			rows = append(rows, [2]string{"excitation.uel", fmt.Sprintf("circle, centre (%.1f MW, %.1f Mvar), radius %.1f Mvar, v^%g", b.PowerMW(u.CenterP), b.PowerMW(u.CenterQ), b.PowerMW(u.Radius), u.K)})
		} else {
			var pts []string
			for i := range u.P {
				pts = append(pts, fmt.Sprintf("(%.1f MW, %.1f Mvar)", b.PowerMW(u.P[i]), b.PowerMW(u.Q[i])))
			}
			rows = append(rows, [2]string{"excitation.uel", fmt.Sprintf("points %s, P with v^%g, Q with v^%g", strings.Join(pts, " "), u.K1, u.K2)})
		}
	}
	curve := func(key string, c *limits.InverseTime) {
		if c == nil {
			return
		}
		var t string
		if len(c.X) > 0 {
			var pts []string
			for i := range c.X {
				pts = append(pts, fmt.Sprintf("(%g pu, %g s)", c.X[i], c.T[i]))
			}
			t = "points " + strings.Join(pts, " ")
		} else {
			t = fmt.Sprintf("pickup %g pu, k_s %g s", c.Pickup, c.K)
		}
		if c.Ceiling > 0 {
			t += fmt.Sprintf(", ceiling %g pu", c.Ceiling)
		}
		rows = append(rows, [2]string{key, t})
	}
	curve("excitation.oel", s.OEL)
	curve("excitation.scl", s.SCL)
	if s.VHzLimiter > 0 {
		rows = append(rows, [2]string{"excitation.vhz_limiter", fmt.Sprintf("setpoint %g pu", s.VHzLimiter)})
	}
	if l := s.LossOfField; l != nil {
		for i, z := range l.Zones {
			t := fmt.Sprintf("offset %.3f pu, diameter %.3f pu (%.3f, %.3f primary Ω)", z.Offset, z.Diameter, z.Offset*l.PrimaryPerPU, z.Diameter*l.PrimaryPerPU)
			if l.SecondaryPerPU > 0 {
				t += fmt.Sprintf(" = %.2f, %.2f secondary Ω", z.Offset*l.SecondaryPerPU, z.Diameter*l.SecondaryPerPU)
			}
			t += fmt.Sprintf(", delay %g s", z.DelayS)
			rows = append(rows, [2]string{fmt.Sprintf("protection.loss_of_field zone %d", i+1), t})
		}
	}
	curve("protection.field_overcurrent", s.FieldOvercurrent)
	for i, g := range s.VHzRelay {
		rows = append(rows, [2]string{fmt.Sprintf("protection.volts_per_hertz stage %d", i+1), fmt.Sprintf("pickup %g pu, delay %g s", g.Pickup, g.DelayS)})
	}
	if t := fu.Transformer; t != nil {
		rows = append(rows, [2]string{"transformer", fmt.Sprintf("%g MVA, LV %g kV, x %g pu", t.MVA, t.KVLV, t.XPU)})
	}
	return rows
}

var htmlTemplate = template.Must(template.New("coord").Parse(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>genvelope coordination study</title>
<style>
body{font-family:'Liberation Sans',Arial,Helvetica,sans-serif;color:#222;margin:24px;max-width:1180px}
h1{font-size:22px;margin:0 0 4px}h2{font-size:18px;margin:28px 0 6px;border-bottom:2px solid #1b4f72}
h3{font-size:14px;margin:16px 0 4px}
.meta{color:#555;font-size:12px}.caution{border-left:4px solid #a04000;background:#fbf3ec;padding:8px 12px;font-size:13px;margin:12px 0}
table{border-collapse:collapse;font-size:12px;margin:6px 0}th,td{border:1px solid #ccc;padding:3px 6px;text-align:left;vertical-align:top}
th{background:#e6eef3}#summary th{font-size:10px;overflow-wrap:anywhere;max-width:96px}.pass{background:#e3f1e6}.fail{background:#f6d5d1;font-weight:bold}.not_applicable{background:#f2f2f2;color:#666}
.charts{display:flex;flex-wrap:wrap;gap:8px}.charts svg{width:560px;height:auto;border:1px solid #ddd}
section.unit{page-break-before:always}
@media print{body{margin:0}.charts svg{width:48%}}
</style></head><body>
<h1>Coordination study: limiters and protection against the machine</h1>
<p class="meta">fleet file {{.File}} · SHA-256 {{.Hash}} · {{.At}}</p>
<p class="caution">{{.Caution}}</p>
<h2>Fleet summary</h2>
<table id="summary"><tr><th>unit</th>{{range .Names}}<th>{{.}}</th>{{end}}</tr>
{{range .Units}}<tr><td><a href="#unit-{{.ID}}">{{.ID}}</a></td>{{range .Checks}}<td class="{{.Status}}">{{.Status}}</td>{{end}}</tr>
{{end}}</table>
<p class="meta">Each grid check runs at 0.95, 1.00 and 1.05 pu terminal voltage and 41 active powers from 0 to p_max, at rated coolant;
its margin is the worst value over the grid, positive when the check holds.</p>
{{range .Units}}<section class="unit" id="unit-{{.ID}}">
<h2>{{.Name}} ({{.ID}}{{if .Site}}, {{.Site}}{{end}})</h2>
<table class="checks"><tr><th>check</th><th>status</th><th>margin</th><th>worst (v, P)</th><th>detail</th></tr>
{{range .Checks}}<tr><td>{{.Name}}</td><td class="{{.Status}}">{{.Status}}</td><td>{{.MarginText}}</td><td>{{.WorstText}}</td><td>{{.Detail}}</td></tr>
{{end}}</table>
{{if .Zone2}}<h3>Loss-of-field zones in the P-Q plane and the manual stability limit (reported, not a check)</h3><ul>{{range .Zone2}}<li>{{.}}</li>{{end}}</ul>{{end}}
<h3>Charts</h3>
<div class="charts">{{range .Charts}}<div class="chart chart-{{.Kind}}">{{.SVG}}</div>{{end}}</div>
<h3>Inputs used</h3>
<table class="inputs">{{range .Inputs}}<tr><th>{{index . 0}}</th><td>{{index . 1}}</td></tr>{{end}}</table>
<p class="caution">{{$.Caution}}</p>
</section>
{{end}}</body></html>
`))

// MarginText is the margin as the report prints it.
func (c Check) MarginText() string { return c.marginText() }

// WorstText is the worst grid point as the report prints it.
func (c Check) WorstText() string { return c.worstText() }
