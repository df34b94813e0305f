package fleet

import (
	"errors"
	"fmt"
	"math"

	"github.com/genvelope/genvelope/limits"
)

// ratedTolPU is how far (pu) the rated point may lie outside the unit's
// own reactive-power bounds before it is an error.
const ratedTolPU = 1e-6

// fieldWarnFraction is how far the nameplate rated field current may lie
// from the model's before it is a warning.
const fieldWarnFraction = 0.05

// Params returns the engine parameters of the unit: per unit on the
// machine base, defaults filled in.
func (u *Unit) Params() limits.Params {
	b := u.Base
	mc := u.Machine
	p := limits.Params{
		Rotor:          mc.Rotor,
		Xd:             mc.Xd,
		Xq:             mc.Xq,
		Xl:             mc.Xl,
		Xp:             mc.Xp,
		Ra:             mc.Ra,
		XdTransient:    mc.XdTransient,
		InertiaHS:      mc.InertiaHS,
		PowerFactor:    u.Rating.PowerFactor,
		FrequencyHz:    u.Rating.FrequencyHz,
		PMax:           b.PowerPU(u.PrimeMover.PMaxMW),
		PMin:           b.PowerPU(u.PrimeMover.PMinMW),
		Xe:             u.Grid.XExternalPU,
		MarginFraction: u.Stability.MarginFraction,
	}
	if s := mc.Saturation; s != nil {
		p.S10, p.S12 = s.S10, s.S12
	}
	if u.Field.RatedA > 0 {
		p.IfdRated = b.FieldPU(u.Field.RatedA)
	}
	if e := u.EndRegion; e != nil {
		er := &limits.EndRegion{VoltageExponent: e.VoltageExponent}
		for _, pt := range e.Points {
			er.P = append(er.P, b.PowerPU(pt.PMW))
			er.Q = append(er.Q, b.PowerPU(pt.QMvar))
		}
		p.EndRegion = er
	}
	p.UEL = u.uelTmp.curve(b) // TEMPORARY: until the engine's excitation decoder lands
	if c := u.Coolant; c != nil {
		co := &limits.Coolant{}
		for _, pt := range c.Points {
			co.At = append(co.At, pt.At)
			co.Armature = append(co.Armature, pt.Armature)
			co.Field = append(co.Field, pt.Field)
		}
		p.Coolant = co
	}
	return p
}

// build makes the engine model of a unit that decoded without errors and
// checks it against its own rating.
func (d *decoder) build(c *unitCtx) {
	u := c.u
	m, err := limits.New(u.Params())
	if err != nil {
		var pe *limits.ParamError
		if errors.As(err, &pe) {
			c.errorf(u.Line(pe.Field), pe.Field, "%s", pe.Reason)
		} else {
			c.errorf(u.line, "", "the unit's parameters are not consistent: %v", err)
		}
		return
	}
	c.checkRatedPoint(m)
	c.checkRatedField(m)
	c.checkSettings()
	if !c.bad {
		u.Model = m
	}
}

// checkRatedPoint checks that the rated point, at rated voltage and no
// coolant value, lies inside the unit's own envelope.
func (c *unitCtx) checkRatedPoint(m *limits.Unit) {
	u := c.u
	b := u.Base
	pf := u.Rating.PowerFactor
	p, q := pf, math.Sqrt(1-pf*pf)
	r := m.Evaluate(limits.Point{P: p, Q: q, V: 1}, nil)
	at := fmt.Sprintf("the rated point (%s MW, %s Mvar at %s kV)", mw(b.PowerMW(p)), mw(b.PowerMW(q)), fmtNum(u.Rating.KV))
	line, field := u.Line("rating"), "rating"
	switch {
	case !r.Feasible:
		c.errorf(line, field, "%s is outside the unit's own envelope: the %s limit has no solution at rated active power; check the machine data",
			at, r.Infeasible)
	case !r.QMax.OK || q > r.QMax.V+ratedTolPU:
		if r.QMaxLimit == limits.LimitField && u.Has("field.rated_a") {
			line, field = u.Line("field.rated_a"), "field.rated_a"
		}
		c.errorf(line, field, "%s is outside the unit's own envelope: the %s limit allows at most %s Mvar there; check the machine data, field.rated_a and the coolant table",
			at, r.QMaxLimit, boundMvar(b, r.QMax))
	case !r.QMin.OK || q < r.QMin.V-ratedTolPU:
		c.errorf(line, field, "%s is outside the unit's own envelope: the %s limit requires at least %s Mvar there; check the machine data and the end-region curve",
			at, r.QMinLimit, boundMvar(b, r.QMin))
	}
}

// checkRatedField warns when the nameplate rated field current is far
// from the model's field current at the rated point.
func (c *unitCtx) checkRatedField(m *limits.Unit) {
	u := c.u
	if u.Field.RatedA <= 0 {
		return
	}
	modelA := u.Base.FieldA(m.ModelRatedFieldCurrent())
	diff := (u.Field.RatedA - modelA) / modelA
	if math.Abs(diff) > fieldWarnFraction {
		c.warnf(u.Line("field.rated_a"), "field.rated_a",
			"the nameplate rated field current %s A is %+.1f %% from the model's %s A at the rated point (more than %g %% apart); check xd, xp, the saturation factors and air_gap_a",
			amps(u.Field.RatedA), 100*diff, amps(modelA), 100*fieldWarnFraction)
	}
}

func mw(x float64) string   { return fmt.Sprintf("%.1f", x) }
func amps(x float64) string { return fmt.Sprintf("%.0f", x) }

func boundMvar(b limits.Base, x limits.Bound) string {
	if !x.OK {
		return "no value"
	}
	return mw(b.PowerMW(x.V))
}
