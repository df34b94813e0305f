package main

import (
	"encoding/csv"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"strconv"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/chart"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/report"
)

// maxEnvelopePoints is the most points --points may ask for.
const maxEnvelopePoints = 10001

type envelopeFlags struct {
	fleet, unit string
	vPU         *number
	coolant     number
	points      int
	format      choice
	out         string
	embedFonts  bool
}

func envelopeCommand() command {
	return command{
		name:    "envelope",
		summary: "write a unit's capability envelope as JSON, CSV or an SVG chart",
		usage:   "--fleet FILE --unit ID --format json|csv|svg [--v-pu 1.0] [--coolant X] [--points 41] [--out FILE] [--embed-fonts]",
		about: "Computes the limit curves of a unit over its active-power range, from 0 to the lower of the\n" +
			"prime mover's p_max and the armature limit, at one terminal voltage and coolant value: for each\n" +
			"P the reactive-power bounds, the limits that set them, and every individual curve in Mvar.\n" +
			"svg draws the capability chart: P (MW) up, Q (Mvar) across, underexcited to the left.",
		advises: true,
		flags: func(fs *flag.FlagSet) func(env) int {
			f := &envelopeFlags{vPU: defaultNumber(1), format: choice{allowed: []string{"json", "csv", "svg"}}}
			fs.StringVar(&f.fleet, "fleet", "", "the fleet `FILE` (YAML)")
			fs.StringVar(&f.unit, "unit", "", "the unit `ID`")
			fs.Var(f.vPU, "v-pu", "terminal voltage in `pu` of rated")
			fs.Var(&f.coolant, "coolant", "coolant value `X` in the unit's table quantity (default: full rating)")
			fs.IntVar(&f.points, "points", 41, "number of `points` along the active-power range (2 to 10001)")
			fs.Var(&f.format, "format", "output `format`: json, csv or svg (required)")
			fs.StringVar(&f.out, "out", "", "write to `FILE` instead of standard output")
			fs.BoolVar(&f.embedFonts, "embed-fonts", false, "svg: embed the fonts, so the chart looks the same everywhere (about 0.5 MB more)")
			return func(e env) int { return envelope(e, f) }
		},
	}
}

func envelope(e env, f *envelopeFlags) int {
	c := envelopeCommand()
	if f.format.v == "" {
		return usageError(e, c, "missing --format json|csv|svg")
	}
	if !(f.vPU.v > 0 && f.vPU.v <= 2) {
		return usageError(e, c, "--v-pu must be a voltage in pu in (0, 2], got %v", f.vPU.v)
	}
	if f.points < 2 || f.points > maxEnvelopePoints {
		return usageError(e, c, "--points must be between 2 and %d, got %d", maxEnvelopePoints, f.points)
	}
	fl, code := loadFleet(e, c, f.fleet)
	if fl == nil {
		return code
	}
	u, code := lookupUnit(e, c, fl, f.unit)
	if u == nil {
		return code
	}
	hasCoolant := f.coolant.set && u.Coolant != nil
	if f.coolant.set && u.Coolant == nil {
		fmt.Fprintf(e.stderr, "genvelope envelope: unit %q has no coolant table; --coolant is ignored\n", u.ID)
	}
	if hasCoolant {
		if _, _, inside := u.Model.CoolantFactors(f.coolant.v); !inside {
			fmt.Fprintf(e.stderr, "genvelope envelope: coolant %g %s is outside unit %q's table; its nearest end is used\n",
				f.coolant.v, u.Coolant.Quantity.Unit(), u.ID)
		}
	}
	pts := u.Model.Envelope(f.vPU.v, f.coolant.v, hasCoolant, f.points)

	err := writeOutput(f.out, e.stdout, func(w io.Writer) error {
		switch f.format.v {
		case "json":
			return writeEnvelopeJSON(w, u, f, hasCoolant, pts)
		case "csv":
			return writeEnvelopeCSV(w, u, pts)
		}
		opts := []chart.Option{chart.WithPrimeMover(u.PrimeMover.PMinMW, u.PrimeMover.PMaxMW)}
		if f.embedFonts {
			opts = append(opts, chart.WithEmbeddedFonts())
		}
		return chart.Capability(w, envelopeTitle(u, f, hasCoolant), pts, u.Base, opts...)
	})
	if err != nil {
		return failf(e, c, exitFailure, "writing the %s: %v", f.format.v, err)
	}
	switch {
	case f.out != "":
		fmt.Fprintf(e.stdout, "wrote %s: %s envelope of unit %q, %d points\n%s\n", f.out, f.format.v, u.ID, len(pts), fleet.Caution)
	case f.format.v == "csv":
		// The CSV holds data only; the caution goes beside it.
		fmt.Fprintln(e.stderr, fleet.Caution)
	}
	return exitOK
}

func envelopeTitle(u *fleet.Unit, f *envelopeFlags, hasCoolant bool) string {
	t := fmt.Sprintf("%s capability at %.2f kV (%.3f pu)", u.ID, u.Base.VoltageKV(f.vPU.v), f.vPU.v)
	if u.Name != "" {
		t = u.Name + ": " + t
	}
	if hasCoolant {
		t += fmt.Sprintf(", coolant %g %s", f.coolant.v, u.Coolant.Quantity.Unit())
	}
	return t
}

func writeEnvelopeJSON(w io.Writer, u *fleet.Unit, f *envelopeFlags, hasCoolant bool, pts []limits.EnvelopePoint) error {
	out := struct {
		Unit            string                 `json:"unit"`
		Name            string                 `json:"name"`
		VPU             float64                `json:"v_pu"`
		VKV             float64                `json:"v_kv"`
		Coolant         *float64               `json:"coolant"`
		CoolantQuantity *string                `json:"coolant_quantity"`
		PMaxMW          float64                `json:"p_max_mw"`
		PMinMW          float64                `json:"p_min_mw"`
		Points          []report.EnvelopePoint `json:"points"`
		Caution         string                 `json:"caution"`
	}{
		Unit: u.ID, Name: u.DisplayName(), VPU: f.vPU.v, VKV: u.Base.VoltageKV(f.vPU.v),
		PMaxMW: u.PrimeMover.PMaxMW, PMinMW: u.PrimeMover.PMinMW, Caution: fleet.Caution,
	}
	if hasCoolant {
		c := f.coolant.v
		out.Coolant = &c
		q := string(u.Coolant.Quantity)
		out.CoolantQuantity = &q
	}
	for _, e := range pts {
		out.Points = append(out.Points, report.NewEnvelopePoint(e, u.Base.MVA))
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(out)
}

// envelopeCSVHeader is the header row of the CSV envelope.
func envelopeCSVHeader() []string {
	return []string{"p_mw", "q_max_mvar", "q_max_limit", "q_min_mvar", "q_min_limit",
		"q_field_mvar", "q_armature_up_mvar", "q_armature_down_mvar",
		"q_stability_mvar", "q_practical_stability_mvar", "q_end_region_mvar", "q_uel_mvar"}
}

func writeEnvelopeCSV(w io.Writer, u *fleet.Unit, pts []limits.EnvelopePoint) error {
	cw := csv.NewWriter(w)
	if err := cw.Write(envelopeCSVHeader()); err != nil {
		return err
	}
	cell := func(v *float64) string {
		if v == nil {
			return ""
		}
		return strconv.FormatFloat(*v, 'f', 4, 64)
	}
	name := func(s *string) string {
		if s == nil {
			return ""
		}
		return *s
	}
	for _, e := range pts {
		p := report.NewEnvelopePoint(e, u.Base.MVA)
		row := []string{strconv.FormatFloat(p.PMW, 'f', 4, 64),
			cell(p.QMaxMvar), name(p.QMaxLimit), cell(p.QMinMvar), name(p.QMinLimit),
			cell(p.QFieldMvar), cell(p.QArmatureUpMvar), cell(p.QArmatureDownMvar),
			cell(p.QStabilityMvar), cell(p.QPracticalStabilityMvar), cell(p.QEndRegionMvar), cell(p.QUELMvar)}
		if err := cw.Write(row); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}
