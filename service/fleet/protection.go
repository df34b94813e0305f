package fleet

import (
	"errors"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/limits"
)

// The generator protection (protection:) and the step-up transformer
// (transformer:) of a unit, for the coordination study (coordination.md).

// Protection is a unit's generator protection, as in the file.
type Protection struct {
	LossOfField      *LossOfField // device 40; nil when not given
	FieldOvercurrent *InverseTime // pu of rated field current; nil when not given
	VoltsPerHertz    *VHzRelay    // device 24; nil when not given
}

// LossOfField is a two-zone offset mho loss-of-field relay as set on it.
type LossOfField struct {
	CTRatio, VTRatio float64 // primary A per secondary A, primary V per secondary V; 0 when not given
	Zones            []MhoZone
}

// MhoZone is one zone: offset and diameter in secondary ohms (InPU false)
// or in pu on the machine base (InPU true).
type MhoZone struct {
	Offset, Diameter float64
	InPU             bool
	DelayS           float64
	Line             int
}

// VHzRelay is a definite-time volts-per-hertz relay.
type VHzRelay struct {
	Stages []VHzStage
}

// VHzStage is one stage: pickup in pu of rated V/Hz on the generator base.
type VHzStage struct {
	PickupPU, DelayS float64
	Line             int
}

// Transformer is the step-up transformer.
type Transformer struct {
	MVA  float64 // rated MVA
	KVLV float64 // rated voltage of the winding on the generator side, kV
	XPU  float64 // leakage reactance on its own base, pu
}

func (c *unitCtx) decodeProtection(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "loss_of_field", "field_overcurrent", "volts_per_hertz")
	if !ok {
		return
	}
	pr := &c.u.Protection
	if lv, ll, ok := m.get("loss_of_field"); ok {
		pr.LossOfField = c.decodeLossOfField(lv, join(path, "loss_of_field"), ll)
	}
	if fv, fl, ok := m.get("field_overcurrent"); ok {
		pr.FieldOvercurrent = c.decodeInverseTime(fv, join(path, "field_overcurrent"), fl, false, "field_pu", "field current in pu of the rated field current")
	}
	if vv, vl, ok := m.get("volts_per_hertz"); ok {
		pr.VoltsPerHertz = c.decodeVHzRelay(vv, join(path, "volts_per_hertz"), vl)
	}
}

func (c *unitCtx) decodeLossOfField(v *yaml.Node, path string, line int) *LossOfField {
	m, ok := c.open(v, path, line, "ct_ratio", "vt_ratio", "zones")
	if !ok {
		return nil
	}
	lof := &LossOfField{}
	good := true
	var okCT, okVT bool
	lof.CTRatio, okCT = c.number(m, "ct_ratio", false, "the CT ratio, primary A per secondary A", positive)
	lof.VTRatio, okVT = c.number(m, "vt_ratio", false, "the VT ratio, primary V per secondary V", positive)
	if (c.u.Has(join(path, "ct_ratio")) && !okCT) || (c.u.Has(join(path, "vt_ratio")) && !okVT) {
		good = false
	}
	items, zl, ok := c.list(m, "zones", true, "one or two zones {offset_ohm, diameter_ohm, delay_s} (secondary ohms) or {offset_pu, diameter_pu, delay_s}")
	if !ok {
		return nil
	}
	field := join(path, "zones")
	for i, item := range items {
		zm, zp, ok := c.openItem(item, field, i, "offset_ohm", "diameter_ohm", "offset_pu", "diameter_pu", "delay_s")
		if !ok {
			good = false
			continue
		}
		ohm := zm.has("diameter_ohm")
		ohmO := zm.has("offset_ohm")
		pu := zm.has("diameter_pu")
		puO := zm.has("offset_pu")
		z := MhoZone{Line: item.Line}
		switch {
		case (ohm || ohmO) && (pu || puO):
			c.errorf(item.Line, zp, "give the zone in secondary ohms (offset_ohm, diameter_ohm) or in pu on the machine base (offset_pu, diameter_pu), not both")
			good = false
			continue
		case pu || puO:
			z.InPU = true
		default:
			if !(okCT && okVT) {
				c.errorf(item.Line, zp, "a zone in secondary ohms needs the relay's ct_ratio and vt_ratio in %s to convert it to the machine base; give both, or give the zone as offset_pu and diameter_pu", path)
				good = false
			}
		}
		unit := "ohm"
		what := "secondary ohms"
		if z.InPU {
			unit, what = "pu", "pu on the machine base"
		}
		var okO, okD, okT bool
		z.Offset, okO = c.number(zm, "offset_"+unit, true, "the offset of the circle below the origin, in "+what+" (C37.102 typical: X'd/2)", func(x float64) string {
			if x > 0 {
				return ""
			}
			return "must be positive (the circle lies below the origin, offset by X'd/2 typically); mho circles through or around the origin are not supported"
		})
		z.Diameter, okD = c.number(zm, "diameter_"+unit, true, "the diameter of the circle in "+what, func(x float64) string {
			if x > 0 {
				return ""
			}
			return "must be a positive diameter (a zone with diameter 0 or below covers nothing)"
		})
		z.DelayS, okT = c.number(zm, "delay_s", true, "the zone's time delay in s", nonNegative)
		if !okO || !okD || !okT {
			good = false
			continue
		}
		lof.Zones = append(lof.Zones, z)
	}
	if !good {
		return nil
	}
	if len(lof.Zones) < 1 || len(lof.Zones) > 2 {
		c.errorf(zl, field, "has %d zone(s); give one or two (zone 1, then zone 2)", len(lof.Zones))
		return nil
	}
	return lof
}

func (c *unitCtx) decodeVHzRelay(v *yaml.Node, path string, line int) *VHzRelay {
	m, ok := c.open(v, path, line, "stages")
	if !ok {
		return nil
	}
	items, sl, ok := c.list(m, "stages", true, "one or more stages {pickup_pu, delay_s}")
	if !ok {
		return nil
	}
	r := &VHzRelay{}
	field := join(path, "stages")
	good := true
	for i, item := range items {
		sm, _, ok := c.openItem(item, field, i, "pickup_pu", "delay_s")
		if !ok {
			good = false
			continue
		}
		p, okP := c.number(sm, "pickup_pu", true, "the stage's pickup in pu of rated V/Hz on the generator base", between(1, 1.5, true, false))
		d, okD := c.number(sm, "delay_s", true, "the stage's time delay in s", nonNegative)
		if !okP || !okD {
			good = false
			continue
		}
		r.Stages = append(r.Stages, VHzStage{PickupPU: p, DelayS: d, Line: item.Line})
	}
	if !good {
		return nil
	}
	if len(r.Stages) == 0 {
		c.errorf(sl, field, "is empty; give at least one stage {pickup_pu, delay_s}")
		return nil
	}
	return r
}

func (c *unitCtx) decodeTransformer(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "mva", "kv_lv", "x_pu")
	if !ok {
		return
	}
	mva, okM := c.number(m, "mva", true, "the transformer's rated MVA", positive)
	kv, okK := c.number(m, "kv_lv", true, "the rated voltage in kV of the winding on the generator side", positive)
	x, okX := c.number(m, "x_pu", false, "the leakage reactance in pu on the transformer's own base", between(0, 1, true, true))
	if !okM || !okK || (c.u.Has(join(path, "x_pu")) && !okX) {
		return
	}
	c.u.Transformer = &Transformer{MVA: mva, KVLV: kv, XPU: x}
}

// protectionCrossChecks checks the protection and limiter settings against
// the unit's rating; called once the rating is read.
func (c *unitCtx) protectionCrossChecks() {
	u := c.u
	if t := u.Transformer; t != nil && c.isOK("rating.kv") {
		if r := t.KVLV / u.Rating.KV; r < 0.8 || r > 1.2 {
			c.errorf(u.Line("transformer.kv_lv"), "transformer.kv_lv", "%s kV is %.0f %% of the generator's %s kV; the winding on the generator side must be rated within 20 %% of it",
				fmtNum(t.KVLV), 100*r, fmtNum(u.Rating.KV))
		}
	}
}

// Settings returns the unit's limiter and protection settings in the
// engine's per-unit form.
func (u *Unit) Settings() limits.Settings {
	s := limits.Settings{
		OEL:              u.Limiters.OEL.Curve(),
		SCL:              u.Limiters.SCL.Curve(),
		FieldOvercurrent: u.Protection.FieldOvercurrent.Curve(),
	}
	if l := u.Limiters.VHzLimiter; l != nil {
		s.VHzLimiter = l.SetpointPU
	}
	zBase := limits.ImpedanceBaseOhm(u.Rating.KV, u.Rating.MVA)
	if l := u.Protection.LossOfField; l != nil && zBase > 0 {
		lof := &limits.LossOfField{PrimaryPerPU: zBase}
		if l.CTRatio > 0 && l.VTRatio > 0 {
			// Z_secondary = Z_primary ct_ratio / vt_ratio (coordination.md).
			lof.SecondaryPerPU = zBase * l.CTRatio / l.VTRatio
		}
		for _, z := range l.Zones {
			k := 1.0
			if !z.InPU {
				k = 1 / lof.SecondaryPerPU
			}
			lof.Zones = append(lof.Zones, limits.MhoZone{Offset: z.Offset * k, Diameter: z.Diameter * k, DelayS: z.DelayS})
		}
		s.LossOfField = lof
	}
	if r := u.Protection.VoltsPerHertz; r != nil {
		for _, g := range r.Stages {
			s.VHzRelay = append(s.VHzRelay, limits.VHzStage{Pickup: g.PickupPU, DelayS: g.DelayS})
		}
	}
	if t := u.Transformer; t != nil && u.Rating.KV > 0 {
		s.Transformer = &limits.Transformer{MVA: t.MVA, LVRatio: t.KVLV / u.Rating.KV, XOwnBasePU: t.XPU}
	}
	return s
}

// checkSettings checks the inverse-time curves once more in the engine's
// form (the decoder has reported what it can see; this catches what only
// the per-unit form shows).
func (c *unitCtx) checkSettings() {
	s := c.u.Settings()
	for _, k := range []struct {
		path string
		it   *limits.InverseTime
	}{{"excitation.oel", s.OEL}, {"excitation.scl", s.SCL}, {"protection.field_overcurrent", s.FieldOvercurrent}} {
		if k.it == nil {
			continue
		}
		if err := k.it.Check(k.path); err != nil {
			var pe *limits.ParamError
			if errors.As(err, &pe) {
				c.errorf(c.u.Line(pe.Field), pe.Field, "%s", pe.Reason)
			}
		}
	}
}
