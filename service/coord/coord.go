// Package coord is the coordination study of a fleet (coordination.md):
// the checks of package limits in engineering units, with one sentence of
// detail each, as JSON, text and a self-contained printable HTML report.
// The command line and the gRPC service share it.
package coord

import (
	"fmt"
	"math"
	"strings"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

// Report is the study of a fleet, in the JSON shape of coordination.md.
type Report struct {
	Units []Unit `json:"units"`
}

// Unit is the study of one unit.
type Unit struct {
	Unit   string  `json:"unit"`
	Checks []Check `json:"checks"`

	fu    *fleet.Unit
	set   limits.Settings
	study limits.Study
}

// Check is one check in engineering units.
type Check struct {
	Name       string   `json:"name"`
	Status     string   `json:"status"`
	Margin     *float64 `json:"margin"` // null when not applicable
	MarginUnit string   `json:"margin_unit"`
	Worst      *Worst   `json:"worst"` // null for checks without a grid point
	Detail     string   `json:"detail"`
}

// Worst is the grid point where a grid check's margin is worst.
type Worst struct {
	VPU float64 `json:"v_pu"`
	PMW float64 `json:"p_mw"`
}

// Failed reports whether any check of the report fails.
func (r *Report) Failed() bool {
	for _, u := range r.Units {
		if u.Failed() {
			return true
		}
	}
	return false
}

// Failed reports whether any check of the unit fails.
func (u *Unit) Failed() bool {
	for _, c := range u.Checks {
		if c.Status == limits.StatusFail.String() {
			return true
		}
	}
	return false
}

// Study runs the study of the units of f (all when ids is empty). Units
// without a model (errors in the file) are left out.
func Study(f *fleet.Fleet, ids ...string) *Report {
	r := &Report{Units: []Unit{}}
	for _, fu := range f.Units {
		if fu.Model == nil || (len(ids) > 0 && !contains(ids, fu.ID)) {
			continue
		}
		r.Units = append(r.Units, StudyUnit(fu))
	}
	return r
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// naturalKind is the unit of each check's margin, also when it is not
// applicable.
func naturalKind(i int) limits.MarginKind {
	switch {
	case i <= limits.CheckUELBeforeLossOfField:
		return limits.MarginPowerPU
	case i <= limits.CheckSCLBeforeArmatureCapability:
		return limits.MarginRatio
	}
	return limits.MarginPU
}

// StudyUnit runs the study of one unit that has a model.
func StudyUnit(fu *fleet.Unit) Unit {
	set := fu.Settings()
	st := fu.Model.Coordinate(&set)
	u := Unit{Unit: fu.ID, fu: fu, set: set, study: st}
	mva := fu.Base.MVA
	for i, c := range st.Checks {
		kind := naturalKind(i)
		if c.Status != limits.StatusNotApplicable {
			kind = c.Kind
		}
		out := Check{Name: c.Name, Status: c.Status.String(), MarginUnit: kind.String()}
		if c.Status != limits.StatusNotApplicable {
			m := c.Margin
			if kind == limits.MarginPowerPU {
				m *= mva
			}
			m = round(m, 4)
			out.Margin = &m
			if c.HasWorst {
				out.Worst = &Worst{VPU: c.WorstV, PMW: round(c.WorstP*mva, 3)}
			}
		}
		out.Detail = detail(fu, &set, i, c)
		u.Checks = append(u.Checks, out)
	}
	return u
}

func round(x float64, digits int) float64 {
	k := math.Pow(10, float64(digits))
	return math.Round(x*k) / k
}

// detail is one sentence about a check's result.
func detail(fu *fleet.Unit, s *limits.Settings, i int, c limits.Check) string {
	mva := fu.Base.MVA
	if c.Status == limits.StatusNotApplicable {
		return "not applicable: give " + strings.Join(c.Missing, " and ") + " to enable it"
	}
	verdict := "holds"
	if c.Status == limits.StatusFail {
		verdict = "fails"
	}
	switch i {
	case limits.CheckUELWithinCapability, limits.CheckUELAboveStability, limits.CheckUELBeforeLossOfField:
		if !c.HasWorst {
			return "the UEL does not bound Q anywhere on the study grid; nothing to compare"
		}
		against := map[string]string{
			"armature": "the armature limit", "end_region": "the stator end-region limit",
			"stability": "the " + fu.Model.Params().Basis.String() + "-basis stability limit",
		}[c.Against]
		if against == "" {
			against = "the top of loss-of-field " + c.Against
		}
		s := fmt.Sprintf("%s; worst at %.2f pu, %.1f MW: UEL at %.1f Mvar against %s at %.1f Mvar",
			verdict, c.WorstV, c.WorstP*mva, c.Setting*mva, against, c.Limit*mva)
		if n := len(c.Points); n > 0 {
			s += fmt.Sprintf(" (%d grid point(s) fail)", n)
		}
		return s
	case limits.CheckOELBeforeFieldCapability, limits.CheckFieldProtectionAfterOEL, limits.CheckSCLBeforeArmatureCapability:
		who := "OEL"
		if i == limits.CheckSCLBeforeArmatureCapability {
			who = "SCL"
		}
		switch {
		case c.BelowRate:
			return fmt.Sprintf("fails: the %s picks up at %.2f pu, below the continuous rating of 1.0 pu", who, c.WorstX)
		case math.IsInf(c.Setting, 1):
			return fmt.Sprintf("fails: the %s does not act below %.2f pu, beyond the range the IEEE C50.13 curve covers", who, c.WorstX)
		case c.WorstX == 0:
			if i == limits.CheckFieldProtectionAfterOEL {
				return "holds: the OEL acts at once or not at all in the range checked, so the relay cannot act first"
			}
			return fmt.Sprintf("holds: the %s acts at once over the whole range checked", who)
		}
		if i == limits.CheckFieldProtectionAfterOEL {
			return fmt.Sprintf("%s; closest at %.2f pu field current: OEL %s, relay %s", verdict, c.WorstX, secs(c.Setting), secs(c.Limit))
		}
		return fmt.Sprintf("%s; closest at %.2f pu: %s %s, %s capability %s", verdict, c.WorstX, who, secs(c.Setting), c.Against, secs(c.Limit))
	case limits.CheckVHzLimiterWithinCapability:
		against := "the generator's continuous 1.05 pu"
		if c.Against == "transformer" {
			t := fu.Transformer
			against = fmt.Sprintf("the transformer's %.3f pu (1.05 × %s/%s kV, IEEE C57.12.00)", c.Limit, num(t.KVLV), num(fu.Rating.KV))
		} else if s.Transformer == nil {
			against += " (no transformer given)"
		}
		return fmt.Sprintf("%s; setpoint %.3f pu against %s", verdict, c.Setting, against)
	case limits.CheckVHzLimiterBeforeRelay:
		return fmt.Sprintf("%s; setpoint %.3f pu against the relay's lowest stage at %.3f pu", verdict, c.Setting, c.Limit)
	}
	return verdict
}

func secs(t float64) string {
	if t <= 0 {
		return "at once"
	}
	if math.IsInf(t, 1) {
		return "never"
	}
	return fmt.Sprintf("%.1f s", t)
}

func num(x float64) string { return fmt.Sprintf("%g", x) }
