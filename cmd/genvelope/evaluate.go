package main

import (
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/report"
)

type evaluateFlags struct {
	fleet, unit          string
	pMW, qMvar, vKV      number
	fieldA, coolant, fHz number
	format               choice
}

func evaluateCommand() command {
	return command{
		name:    "evaluate",
		summary: "place one operating point against a unit's limits",
		usage:   "--fleet FILE --unit ID --p-mw P --q-mvar Q --v-kv V [--field-a A] [--coolant X] [--frequency-hz F] [--format text|json]",
		about: "Evaluates one operating point of a unit: the reactive-power bounds at its active power and\n" +
			"voltage and which limit sets each, the headroom, the margin to every limit, the volts-per-hertz\n" +
			"zone and the critical clearing time. Q is positive when the generator supplies reactive power\n" +
			"(overexcited) and negative when it absorbs it (underexcited).",
		advises: true,
		flags: func(fs *flag.FlagSet) func(env) int {
			f := &evaluateFlags{format: choice{v: "text", allowed: []string{"text", "json"}}}
			fs.StringVar(&f.fleet, "fleet", "", "the fleet `FILE` (YAML)")
			fs.StringVar(&f.unit, "unit", "", "the unit `ID`")
			fs.Var(&f.pMW, "p-mw", "active power in `MW` (required)")
			fs.Var(&f.qMvar, "q-mvar", "reactive power in `Mvar`, positive overexcited (required)")
			fs.Var(&f.vKV, "v-kv", "terminal voltage, line-line, in `kV` (required)")
			fs.Var(&f.fieldA, "field-a", "measured field current in `A` (optional; used for the field margin)")
			fs.Var(&f.coolant, "coolant", "coolant value `X` in the unit's table quantity, e.g. kPa of hydrogen or °C (optional)")
			fs.Var(&f.fHz, "frequency-hz", "frequency in `Hz` (default: the unit's rated frequency)")
			fs.Var(&f.format, "format", "output `format`: text or json")
			return func(e env) int { return evaluate(e, f) }
		},
	}
}

func evaluate(e env, f *evaluateFlags) int {
	c := evaluateCommand()
	for _, req := range []struct {
		name string
		n    *number
	}{{"--p-mw", &f.pMW}, {"--q-mvar", &f.qMvar}, {"--v-kv", &f.vKV}} {
		if !req.n.set {
			return usageError(e, c, "missing %s", req.name)
		}
	}
	if !(f.vKV.v > 0) {
		return usageError(e, c, "--v-kv must be a positive voltage in kV, got %v", f.vKV.v)
	}
	if f.fHz.set && !(f.fHz.v > 0) {
		return usageError(e, c, "--frequency-hz must be a positive frequency in Hz, got %v", f.fHz.v)
	}
	if f.fieldA.set && f.fieldA.v < 0 {
		return usageError(e, c, "--field-a must not be negative, got %v", f.fieldA.v)
	}
	fl, code := loadFleet(e, c, f.fleet)
	if fl == nil {
		return code
	}
	u, code := lookupUnit(e, c, fl, f.unit)
	if u == nil {
		return code
	}
	if f.coolant.set && u.Coolant == nil {
		fmt.Fprintf(e.stderr, "genvelope evaluate: unit %q has no coolant table; --coolant is ignored\n", u.ID)
	}
	pt := report.Point(u, report.Reading{PMW: f.pMW.v, QMvar: f.qMvar.v, VKV: f.vKV.v, FieldA: f.fieldA.v, HasFieldA: f.fieldA.set,
		FrequencyHz: f.fHz.v, HasFrequency: f.fHz.set, Coolant: f.coolant.v, HasCoolant: f.coolant.set})
	r := u.Model.Evaluate(pt, nil)
	out := report.New(u, pt, &r)
	out.SetRotorMode(u, pt)
	if f.format.v == "json" {
		enc := json.NewEncoder(e.stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(out); err != nil {
			return failf(e, c, exitFailure, "writing JSON: %v", err)
		}
		return exitOK
	}
	if err := writeEvaluationText(e.stdout, u, out); err != nil {
		return failf(e, c, exitFailure, "writing the report: %v", err)
	}
	return exitOK
}

// writeEvaluationText writes the readable report of an evaluation.
func writeEvaluationText(w io.Writer, u *fleet.Unit, ev *report.Evaluation) error {
	var b strings.Builder
	title := u.ID
	if u.Name != "" {
		title += " (" + u.Name + ")"
	}
	if u.Site != "" {
		title += ", site " + u.Site
	}
	fmt.Fprintf(&b, "%s\n%s\n", title, strings.Repeat("=", len([]rune(title))))
	tw := tabwriter.NewWriter(&b, 0, 0, 2, ' ', 0)
	line := func(label, format string, args ...any) {
		fmt.Fprintf(tw, "%s\t%s\n", label, fmt.Sprintf(format, args...))
	}
	freq := fmt.Sprintf("%.2f Hz", ev.FrequencyHz)
	line("operating point", "P %.1f MW, Q %+.1f Mvar, V %.2f kV (%.3f pu), %s", ev.PMW, ev.QMvar, ev.VKV, ev.VPU, freq)
	if ev.Coolant != nil {
		note := ""
		if ev.CoolantOutsideTable {
			note = " (outside the table; its nearest end is used)"
		}
		line("coolant", "%g %s (%s)%s", *ev.Coolant, u.Coolant.Quantity.Unit(), *ev.CoolantQuantity, note)
	} else if u.Coolant != nil {
		line("coolant", "not given (--coolant); the full rating of the table is assumed")
	}
	switch {
	case !ev.Feasible:
		line("verdict", "NO CONTINUOUS OPERATION at this P and V: the %s limit leaves no reactive range", deref(ev.InfeasibleLimit))
	case ev.WithinLimits:
		line("verdict", "within limits; nearest: %s", describeMargin(ev, deref(ev.BindingLimit)))
	default:
		line("verdict", "OUTSIDE LIMITS: %s", strings.Join(violations(ev), "; "))
	}
	line("reactive range", "%s .. %s Mvar", signedOr(ev.QMinMvar, ev.QMinLimit), signedOr(ev.QMaxMvar, ev.QMaxLimit))
	line("headroom", "%s Mvar up, %s Mvar down", orNone(ev.QHeadroomUpMvar, "%.1f"), orNone(ev.QHeadroomDownMvar, "%.1f"))
	line("active power bound", "%s MW (prime mover %.1f to %.1f MW)", orNone(ev.PMaxMW, "%.1f"), u.PrimeMover.PMinMW, u.PrimeMover.PMaxMW)
	line("armature current", "%s pu, %s A of %s A", orNone(ev.ArmatureCurrentPU, "%.3f"), orNone(ev.ArmatureCurrentA, "%.0f"), orNone(ev.ArmatureCurrentLimitA, "%.0f"))
	fieldNote := ""
	if ev.FieldCurrentMeasuredA != nil {
		fieldNote = fmt.Sprintf(", measured %.0f A", *ev.FieldCurrentMeasuredA)
	}
	line("field current", "model %s A of %s A%s", orNone(ev.FieldCurrentModelA, "%.0f"), orNone(ev.FieldCurrentLimitA, "%.0f"), fieldNote)
	line("load angle", "%s°", orNone(ev.LoadAngleDeg, "%.1f"))
	line("volts per hertz", "%s pu, zone %s", orNone(ev.VoltsPerHertzPU, "%.3f"), ev.Zone)
	if m := ev.RotorMode; m != nil {
		line("rotor mode", "%.2f Hz, damping ratio %.3f (%s basis)", m.FrequencyHz, m.DampingRatio, ev.StabilityBasis)
	} else {
		line("rotor mode", "none (%s basis)", ev.StabilityBasis)
	}
	line("critical clearing time", "%s", orNone(ev.CriticalClearingTimeS, "%.3f s (classical model)", "not known (needs xd_transient and inertia_h_s, P > 0 and a point stable at constant field voltage)"))
	if err := tw.Flush(); err != nil {
		return err
	}

	b.WriteString("\nlimit curves at this P and V, Mvar\n")
	curve := func(label string, v *float64) {
		fmt.Fprintf(&b, "  %-42s %8s\n", label, orNone(v, "%+.1f"))
	}
	curve("field current limit", ev.QFieldMvar)
	curve("armature current limit, overexcited", ev.QArmatureUpMvar)
	curve("armature current limit, underexcited", ev.QArmatureDownMvar)
	curve("steady-state stability limit ("+ev.StabilityBasis+" basis)", ev.QStabilityMvar)
	curve("practical stability limit", ev.QPracticalStabilityMvar)
	if u.EndRegion != nil {
		curve("stator end-region limit", ev.QEndRegionMvar)
	}
	if u.Excitation != nil && u.Excitation.UEL != nil {
		curve("underexcitation limiter (UEL)", ev.QUELMvar)
	}

	b.WriteString("\nmargins\n")
	for _, l := range limits.Limits() {
		if l == limits.LimitEndRegion && u.EndRegion == nil {
			continue
		}
		fmt.Fprintf(&b, "  %-42s %13s\n", l, describeMarginValue(ev, l.String()))
	}
	fmt.Fprintf(&b, "\n%s\n", fleet.Caution)
	_, err := io.WriteString(w, b.String())
	return err
}

func deref(s *string) string {
	if s == nil {
		return "none"
	}
	return *s
}

// orNone formats v, or returns absent (default "none") when v is nil.
func orNone(v *float64, format string, absent ...string) string {
	if v == nil {
		if len(absent) > 0 {
			return absent[0]
		}
		return "none"
	}
	return fmt.Sprintf(format, *v)
}

func signedOr(v *float64, limit *string) string {
	if v == nil {
		return fmt.Sprintf("none (%s)", deref(limit))
	}
	return fmt.Sprintf("%+.1f (%s)", *v, deref(limit))
}

// marginInMvar reports whether a margin is in pu of rated MVA rather than
// a ratio.
func marginInMvar(name string) bool {
	return name == limits.LimitStability.String() || name == limits.LimitEndRegion.String() || name == limits.LimitUEL.String()
}

func describeMarginValue(ev *report.Evaluation, name string) string {
	m := ev.Margins[name]
	if m == nil {
		return "none"
	}
	if marginInMvar(name) {
		return fmt.Sprintf("%+.1f Mvar", *m*ev.RatedMVA)
	}
	return fmt.Sprintf("%+.1f %%", 100**m)
}

func describeMargin(ev *report.Evaluation, name string) string {
	return fmt.Sprintf("%s (margin %s)", name, describeMarginValue(ev, name))
}

// violations lists the limits the point is beyond.
func violations(ev *report.Evaluation) []string {
	var out []string
	if up := ev.QHeadroomUpMvar; up != nil && *up < 0 {
		out = append(out, fmt.Sprintf("Q above q_max (%s limit) by %.1f Mvar", deref(ev.QMaxLimit), -*up))
	}
	if down := ev.QHeadroomDownMvar; down != nil && *down < 0 {
		out = append(out, fmt.Sprintf("Q below q_min (%s limit) by %.1f Mvar", deref(ev.QMinLimit), -*down))
	}
	for _, l := range limits.Limits() {
		if m := ev.Margins[l.String()]; m != nil && *m < 0 {
			out = append(out, fmt.Sprintf("%s exceeded by %s", l, strings.TrimPrefix(describeMarginValue(ev, l.String()), "-")))
		}
	}
	return out
}
