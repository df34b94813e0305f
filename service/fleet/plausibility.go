package fleet

import "go.yaml.in/yaml/v3"

// Plausibility is the range of values a unit can physically report.
// A sample outside it is rejected as implausible (most often a unit
// mix-up: kV sent as pu, MW as kW, A as kA) before it touches the unit's
// state. Zero fields take the defaults (see Effective).
type Plausibility struct {
	VoltageMinPU, VoltageMaxPU float64 // terminal voltage, of rated kV
	PowerMaxPU                 float64 // |P| and |Q|, of rated MVA
	CurrentMaxPU               float64 // armature current, of rated current
	FieldMaxPU                 float64 // field current, of the rated field current
	// StepMaxPU is the largest change of armature current, of rated
	// current, between two consecutive samples that is taken at face
	// value; a larger jump is flagged suspect and not held into the
	// thermal accumulators until a following sample confirms it.
	StepMaxPU float64
}

// DefaultPlausibility is what a unit without a plausibility: block
// allows. The voltage range (0.5 to 1.3 pu) is wider than any continuous
// operating range (IEC 60034-1 zone B is 0.92 to 1.08 pu) and narrower
// than a factor of the common unit mix-ups (a value in pu or V instead of
// kV is off by the rated kV or by 1000); 1.5 pu of rated MVA for P and Q
// and 2.5 pu armature current cover the short-time overloads of IEEE
// C50.13 (2.26 pu for 10 s from its K = 37.5 s); 3 × the rated field
// current is above the ceiling of common excitation systems (common
// practice: ceiling about 2 × rated; C50.13's field short-time
// capability is 2.09 × rated for 10 s). A current jump of 1 pu between
// two samples is flagged.
var DefaultPlausibility = Plausibility{VoltageMinPU: 0.5, VoltageMaxPU: 1.3, PowerMaxPU: 1.5, CurrentMaxPU: 2.5, FieldMaxPU: 3, StepMaxPU: 1}

// Effective returns p with every zero field replaced by its default.
func (p Plausibility) Effective() Plausibility {
	d := DefaultPlausibility
	pick := func(x, def float64) float64 {
		if x > 0 {
			return x
		}
		return def
	}
	return Plausibility{
		VoltageMinPU: pick(p.VoltageMinPU, d.VoltageMinPU), VoltageMaxPU: pick(p.VoltageMaxPU, d.VoltageMaxPU),
		PowerMaxPU: pick(p.PowerMaxPU, d.PowerMaxPU), CurrentMaxPU: pick(p.CurrentMaxPU, d.CurrentMaxPU),
		FieldMaxPU: pick(p.FieldMaxPU, d.FieldMaxPU), StepMaxPU: pick(p.StepMaxPU, d.StepMaxPU),
	}
}

// decodePlausibility reads a unit's plausibility: block:
//
//	plausibility: {voltage_min_pu: 0.5, voltage_max_pu: 1.3, power_max_pu: 1.5,
//	               current_max_pu: 2.5, field_max_pu: 6, step_max_pu: 1}
func (c *unitCtx) decodePlausibility(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "voltage_min_pu", "voltage_max_pu", "power_max_pu", "current_max_pu", "field_max_pu", "step_max_pu")
	if !ok {
		return
	}
	p := &c.u.Plausibility
	p.VoltageMinPU, _ = c.number(m, "voltage_min_pu", false, "the lowest plausible terminal voltage, pu of rated kV", between(0.05, 1, true, false))
	p.VoltageMaxPU, _ = c.number(m, "voltage_max_pu", false, "the highest plausible terminal voltage, pu of rated kV", between(1, 2, false, false))
	p.PowerMaxPU, _ = c.number(m, "power_max_pu", false, "the largest plausible |P| and |Q|, pu of rated MVA", between(1, 5, false, false))
	p.CurrentMaxPU, _ = c.number(m, "current_max_pu", false, "the largest plausible armature current, pu of rated", between(1, 10, false, false))
	p.FieldMaxPU, _ = c.number(m, "field_max_pu", false, "the largest plausible field current, multiple of the rated field current", between(1, 10, false, false))
	p.StepMaxPU, _ = c.number(m, "step_max_pu", false, "the largest armature current change between two samples taken at face value, pu of rated", between(0, 10, true, false))
	if e := p.Effective(); e.VoltageMinPU >= e.VoltageMaxPU {
		c.errorf(line, path, "voltage_min_pu %g must be below voltage_max_pu %g", e.VoltageMinPU, e.VoltageMaxPU)
	}
}
