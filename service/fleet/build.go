package fleet

import (
	"context"
	"fmt"
	"math"
	"sync"
	"sync/atomic"

	"github.com/genvelope/genvelope/limits"
)

// ratedTolPU is how far (pu) the rated point may lie outside the unit's
// own reactive-power bounds before it is a finding.
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
		Td0TransientS:  mc.Td0TransientS,
		DampingPU:      mc.DampingPU,
		PowerFactor:    u.Rating.PowerFactor,
		FrequencyHz:    u.Rating.FrequencyHz,
		PMax:           b.PowerPU(u.PrimeMover.PMaxMW),
		PMin:           b.PowerPU(u.PrimeMover.PMinMW),
		Xe:             u.Grid.XExternalPU,
		MarginFraction: u.Stability.MarginFraction,
		Basis:          u.Stability.Basis,
		ZetaMin:        u.Stability.ZetaMin,
	}
	if s := mc.Saturation; s != nil {
		p.S10, p.S12 = s.S10, s.S12
	}
	if u.Field.RatedA > 0 {
		p.IfdRated = b.FieldPU(u.Field.RatedA)
	}
	if e := u.Excitation; e != nil {
		p.Exciter = &limits.Exciter{KA: e.KA, TAS: e.TAS, TRS: e.TRS, EfdMin: e.EfdMinPU, EfdMax: e.EfdMaxPU}
		if c := e.UEL; c != nil {
			p.UEL = &limits.UEL{Shape: c.Shape,
				CenterP: b.PowerPU(c.CenterPMW), CenterQ: b.PowerPU(c.CenterQMvar), Radius: b.PowerPU(c.RadiusMvar), K: c.VoltageExponent,
				K1: c.VoltageExponentP, K2: c.VoltageExponentQ}
			for _, pt := range c.Points {
				p.UEL.P = append(p.UEL.P, b.PowerPU(pt.PMW))
				p.UEL.Q = append(p.UEL.Q, b.PowerPU(pt.QMvar))
			}
		}
	}
	if s := u.Stabilizer; s != nil {
		p.Stabilizer = &limits.Stabilizer{K: s.K, TWS: s.TWS, T1S: s.T1S, T2S: s.T2S, T3S: s.T3S, T4S: s.T4S}
	}
	if e := u.EndRegion; e != nil {
		er := &limits.EndRegion{VoltageExponent: e.VoltageExponent}
		for _, pt := range e.Points {
			er.P = append(er.P, b.PowerPU(pt.PMW))
			er.Q = append(er.Q, b.PowerPU(pt.QMvar))
		}
		p.EndRegion = er
	}
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

// build makes the engine model of a unit (its avr table shared through
// tables, which may be nil), reporting limits.New's
// findings at the lines of their keys, and checks the model against the
// unit's own rating (warnings: the unit is monitored all the same). A
// unit that already has errors is checked too, so that every problem is
// reported at once, but only the findings about values that were read
// without a problem (the others would be echoes).
func (c *unitCtx) build(tables *limits.Tables) {
	u := c.u
	hadErrors := c.bad
	if hadErrors && !(c.isOK("rating.mva") && c.isOK("rating.kv") && c.isOK("field.air_gap_a")) {
		return // without the base every value in MW or A converts wrong
	}
	m, err := limits.NewShared(u.Params(), tables)
	if err != nil {
		pes := limits.ParamErrors(err)
		for _, pe := range pes {
			if !hadErrors || c.isOK(pe.Field) {
				c.errorf(u.Line(pe.Field), pe.Field, "%s", pe.Reason)
			}
		}
		if len(pes) == 0 && !hadErrors {
			c.errorf(u.line, "", "the unit's parameters are not consistent: %v", err)
		}
		return
	}
	if hadErrors {
		return
	}
	c.checkRatedPoint(m)
	c.checkRatedField(m)
	c.checkSettings()
	if !c.bad {
		u.Model = m
	}
}

// checkRatedPoint warns when the rated point, at rated voltage and no
// coolant value, lies outside the unit's own envelope, saying which limit
// and by how much (envelope.md, "Fleet-file findings"): the data of a
// real fleet often disagree a little, and the envelope then shows it.
func (c *unitCtx) checkRatedPoint(m *limits.Unit) {
	u := c.u
	b := u.Base
	pf := u.Rating.PowerFactor
	p, q := pf, math.Sqrt(1-pf*pf)
	r := m.Evaluate(limits.Point{P: p, Q: q, V: 1}, nil)
	at := fmt.Sprintf("the rated point (%s MW, %s Mvar at %s kV)", mw(b.PowerMW(p)), mw(b.PowerMW(q)), fmtNum(u.Rating.KV))
	line, field := u.Line("rating"), "rating"
	basis := u.Stability.Basis
	switch {
	case !r.Feasible && r.Infeasible == limits.LimitStability:
		c.warnf(line, field, "%s: no stable operation at rated active power on the %s basis (grid.x_external_pu %s); the unit is monitored, and reads outside its envelope there",
			at, basis, fmtNum(u.Grid.XExternalPU))
	case !r.Feasible:
		c.warnf(line, field, "%s is outside the unit's own envelope: the %s limit has no value at rated active power; check the machine data",
			at, r.Infeasible)
	case q > r.QMax.V+ratedTolPU:
		if r.QMaxLimit == limits.LimitField && u.Has("field.rated_a") {
			line, field = u.Line("field.rated_a"), "field.rated_a"
		}
		c.warnf(line, field, "%s is outside the unit's own envelope by %s Mvar: the %s limit allows at most %s Mvar there; check the machine data, field.rated_a and the coolant table",
			at, mw(b.PowerMW(q-r.QMax.V)), r.QMaxLimit, boundMvar(b, r.QMax))
	case q < r.QMin.V-ratedTolPU:
		c.warnf(line, field, "%s is outside the unit's own envelope by %s Mvar: the %s limit requires at least %s Mvar there; check the machine data, the end-region and UEL curves",
			at, mw(b.PowerMW(r.QMin.V-q)), r.QMinLimit, boundMvar(b, r.QMin))
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

// buildAll builds the engine model of every unit (build), on up to
// workers goroutines (the loader passes GOMAXPROCS): a 10,000-unit avr
// fleet spends most of its load in limits.New's stability tables. Units
// of one design share their table (limits.Tables, one per load). Each
// unit's findings are collected apart and appended in file order, so the
// diagnostics are those of a build in file order. It returns ctx's error
// when ctx ends first; every goroutine has ended when it returns.
func (d *decoder) buildAll(ctx context.Context, workers int) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	tables := limits.NewTables()
	own := make([]*decoder, len(d.units))
	inParallel(ctx, len(d.units), workers, func(i int) {
		c := d.units[i]
		own[i] = &decoder{file: d.file, fleet: d.fleet, paths: d.paths} // the path table only read while building
		c.d = own[i]
		c.build(tables)
	})
	for i, c := range d.units {
		c.d = d
		if own[i] != nil {
			d.diags = append(d.diags, own[i].diags...)
		}
	}
	return ctx.Err()
}

// inParallel calls do(i) for i in [0, n) on up to workers goroutines
// (at least one), each taking the next i, until ctx ends; every goroutine
// has ended when it returns.
func inParallel(ctx context.Context, n, workers int, do func(i int)) {
	var next atomic.Int64
	var wg sync.WaitGroup
	for range max(1, min(workers, n)) {
		wg.Go(func() {
			for ctx.Err() == nil {
				i := int(next.Add(1)) - 1
				if i >= n {
					return
				}
				do(i)
			}
		})
	}
	wg.Wait()
}
