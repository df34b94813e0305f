// Package report turns the engine's per-unit results into the
// engineering-unit reports every output shares: the command line's JSON
// and text, the gRPC API and the web pages. One conversion, so that every
// output says the same number.
package report

import (
	"math"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

// Reading is one operating point as measured, in engineering units. A
// value whose Has flag is false was not measured.
type Reading struct {
	PMW, QMvar, VKV float64

	FieldA       float64
	HasFieldA    bool // FieldA holds a measurement the engine may use
	FrequencyHz  float64
	HasFrequency bool
	Coolant      float64
	HasCoolant   bool
}

// Point converts a reading to the engine's per unit on unit u's base. A
// coolant value is dropped for a unit without a coolant table.
func Point(u *fleet.Unit, r Reading) limits.Point { return PointOn(u.Base, u.Coolant != nil, r) }

// PointOn is Point for a unit of base b, with a coolant table or not
// (the per-sample path keeps both beside its hot state).
func PointOn(b limits.Base, coolantTable bool, r Reading) limits.Point {
	pt := limits.Point{P: b.PowerPU(r.PMW), Q: b.PowerPU(r.QMvar), V: b.VoltagePU(r.VKV),
		Ifd: b.FieldPU(r.FieldA), IfdMeasured: r.HasFieldA, Coolant: r.Coolant, HasCoolant: r.HasCoolant && coolantTable}
	if r.HasFrequency {
		pt.F = b.FrequencyPU(r.FrequencyHz)
	}
	return pt
}

// Evaluation is one operating point placed against its unit's envelope,
// in engineering units. A nil pointer is a value that does not exist (a
// bound with no solution at this active power, a quantity the unit lacks
// the data for) and is written as JSON null, never NaN.
type Evaluation struct {
	Unit                    string              `json:"unit"`
	Name                    string              `json:"name"`
	Site                    string              `json:"site"`
	PMW                     float64             `json:"p_mw"`
	QMvar                   float64             `json:"q_mvar"`
	VKV                     float64             `json:"v_kv"`
	VPU                     float64             `json:"v_pu"`
	FrequencyHz             float64             `json:"frequency_hz"`
	RatedMVA                float64             `json:"rated_mva"` // the base of the per-unit margins
	Coolant                 *float64            `json:"coolant"`
	CoolantQuantity         *string             `json:"coolant_quantity"`
	CoolantOutsideTable     bool                `json:"coolant_outside_table"`
	ArmatureRatingFactor    float64             `json:"armature_rating_factor"` // coolant factor on the armature rating
	FieldRatingFactor       float64             `json:"field_rating_factor"`    // coolant factor on the field rating
	ArmatureCurrentPU       *float64            `json:"armature_current_pu"`
	ArmatureCurrentA        *float64            `json:"armature_current_a"`
	ArmatureCurrentLimitA   *float64            `json:"armature_current_limit_a"`
	FieldCurrentModelA      *float64            `json:"field_current_model_a"`
	FieldCurrentMeasuredA   *float64            `json:"field_current_measured_a"`
	FieldCurrentLimitA      *float64            `json:"field_current_limit_a"`
	LoadAngleDeg            *float64            `json:"load_angle_deg"`
	QMaxMvar                *float64            `json:"q_max_mvar"`
	QMaxLimit               *string             `json:"q_max_limit"`
	QMinMvar                *float64            `json:"q_min_mvar"`
	QMinLimit               *string             `json:"q_min_limit"`
	QHeadroomUpMvar         *float64            `json:"q_headroom_up_mvar"`
	QHeadroomDownMvar       *float64            `json:"q_headroom_down_mvar"`
	QFieldMvar              *float64            `json:"q_field_mvar"`
	QArmatureUpMvar         *float64            `json:"q_armature_up_mvar"`
	QArmatureDownMvar       *float64            `json:"q_armature_down_mvar"`
	QStabilityMvar          *float64            `json:"q_stability_mvar"`
	QPracticalStabilityMvar *float64            `json:"q_practical_stability_mvar"`
	QEndRegionMvar          *float64            `json:"q_end_region_mvar"`
	QUELMvar                *float64            `json:"q_uel_mvar"`
	StabilityBasis          string              `json:"stability_basis"` // "manual" or "avr": what q_stability_mvar assumes
	PMaxMW                  *float64            `json:"p_max_mw"`
	Margins                 map[string]*float64 `json:"margins"`
	BindingLimit            *string             `json:"binding_limit"`
	Feasible                bool                `json:"feasible"`
	InfeasibleLimit         *string             `json:"infeasible_limit"`
	WithinLimits            bool                `json:"within_limits"`
	VoltsPerHertzPU         *float64            `json:"volts_per_hertz_pu"`
	Zone                    string              `json:"zone"`
	CriticalClearingTimeS   *float64            `json:"critical_clearing_time_s"`
	// RotorMode is set by the readers that show it (SetRotorMode): an
	// eigen decomposition, solved when read, never per sample. Null on
	// the manual basis.
	RotorMode *RotorMode `json:"rotor_mode"`
	Caution   string     `json:"caution"`
}

// RotorMode is the rotor (electromechanical) mode of the linearized
// machine with its regulator at an operating point (envelope.md, the avr
// basis).
type RotorMode struct {
	FrequencyHz  float64 `json:"frequency_hz"`
	DampingRatio float64 `json:"damping_ratio"` // -Re(lambda)/|lambda|; negative when the oscillation grows
}

// SetRotorMode solves the rotor mode of ev's unit u at pt, the point ev
// reports, and puts it into ev: nil on the manual basis, where the mode
// is not oscillatory, or where the eigenvalue solver fails.
func (ev *Evaluation) SetRotorMode(u *fleet.Unit, pt limits.Point) {
	ev.RotorMode = nil
	m, ok, err := u.Model.RotorMode(pt)
	if !ok || err != nil || math.IsNaN(m.FrequencyHz) || math.IsNaN(m.DampingRatio) {
		return
	}
	ev.RotorMode = &RotorMode{FrequencyHz: m.FrequencyHz, DampingRatio: m.DampingRatio}
}

// num returns x, or nil when it is not finite.
func num(x float64) *float64 {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return nil
	}
	return &x
}

// bound returns the bound scaled by k, or nil when it is absent.
func bound(b limits.Bound, k float64) *float64 {
	if !b.OK {
		return nil
	}
	return num(b.V * k)
}

// limitName returns the limit's name, or nil for no limit.
func limitName(l limits.Limit) *string {
	if l == limits.NoLimit {
		return nil
	}
	s := LimitOf(l).Name
	return &s
}

// New reports result r of operating point pt (per unit) of unit u, as
// returned by u.Model.Evaluate(pt, ...).
func New(u *fleet.Unit, pt limits.Point, r *limits.Result) *Evaluation {
	fHz := u.Rating.FrequencyHz
	if pt.F != 0 {
		fHz = u.Base.FrequencyHz * pt.F
	}
	b := u.Base
	mva := b.MVA
	ev := &Evaluation{
		Unit: u.ID, Name: u.DisplayName(), Site: u.Site,
		RatedMVA: b.MVA,
		PMW:      b.PowerMW(pt.P), QMvar: b.PowerMW(pt.Q), VKV: b.VoltageKV(pt.V), VPU: pt.V, FrequencyHz: fHz,
		CoolantOutsideTable:     r.CoolantOutside,
		ArmatureRatingFactor:    r.IMax,
		FieldRatingFactor:       r.IfdMax / u.Model.RatedFieldCurrent(),
		ArmatureCurrentPU:       num(r.I),
		ArmatureCurrentA:        num(r.I * b.CurrentA()),
		ArmatureCurrentLimitA:   num(r.IMax * b.CurrentA()),
		FieldCurrentModelA:      num(b.FieldA(r.IfdModel)),
		FieldCurrentLimitA:      num(b.FieldA(r.IfdMax)),
		LoadAngleDeg:            num(u.Model.LoadAngle(pt.P, pt.Q, pt.V) * 180 / math.Pi),
		QMaxMvar:                bound(r.QMax, mva),
		QMaxLimit:               limitName(r.QMaxLimit),
		QMinMvar:                bound(r.QMin, mva),
		QMinLimit:               limitName(r.QMinLimit),
		QFieldMvar:              bound(r.Field, mva),
		QArmatureUpMvar:         bound(r.ArmatureUp, mva),
		QArmatureDownMvar:       bound(r.ArmatureDown, mva),
		QStabilityMvar:          bound(r.Stability, mva),
		QPracticalStabilityMvar: bound(r.Practical, mva),
		QEndRegionMvar:          bound(r.EndRegion, mva),
		QUELMvar:                bound(r.UEL, mva),
		StabilityBasis:          u.Model.Params().Basis.String(),
		PMaxMW:                  bound(r.PMax, mva),
		Margins:                 map[string]*float64{},
		BindingLimit:            limitName(r.Binding),
		Feasible:                r.Feasible,
		VoltsPerHertzPU:         num(r.VPerHz),
		Zone:                    r.Zone.String(),
		CriticalClearingTimeS:   bound(u.Model.CriticalClearingTime(pt.P, pt.Q, pt.V), 1),
		Caution:                 fleet.Caution,
	}
	if pt.HasCoolant {
		ev.Coolant = num(pt.Coolant)
		q := string(u.Coolant.Quantity)
		ev.CoolantQuantity = &q
	}
	if pt.IfdMeasured {
		ev.FieldCurrentMeasuredA = num(b.FieldA(pt.Ifd))
	}
	up, down := r.Headroom(pt.Q)
	ev.QHeadroomUpMvar, ev.QHeadroomDownMvar = bound(up, mva), bound(down, mva)
	if !r.Feasible {
		ev.InfeasibleLimit = limitName(r.Infeasible)
	}
	within := r.Feasible
	for _, l := range limits.Limits() {
		m := r.Margins[l]
		ev.Margins[LimitOf(l).Name] = bound(m, 1)
		if m.OK && m.V < 0 {
			within = false
		}
	}
	if up.OK && up.V < 0 || down.OK && down.V < 0 {
		within = false
	}
	ev.WithinLimits = within
	return ev
}

// EnvelopePoint is the envelope at one active power, in MW and Mvar.
type EnvelopePoint struct {
	PMW                     float64  `json:"p_mw"`
	QMaxMvar                *float64 `json:"q_max_mvar"`
	QMaxLimit               *string  `json:"q_max_limit"`
	QMinMvar                *float64 `json:"q_min_mvar"`
	QMinLimit               *string  `json:"q_min_limit"`
	QFieldMvar              *float64 `json:"q_field_mvar"`
	QArmatureUpMvar         *float64 `json:"q_armature_up_mvar"`
	QArmatureDownMvar       *float64 `json:"q_armature_down_mvar"`
	QStabilityMvar          *float64 `json:"q_stability_mvar"`
	QPracticalStabilityMvar *float64 `json:"q_practical_stability_mvar"`
	QEndRegionMvar          *float64 `json:"q_end_region_mvar"`
	QUELMvar                *float64 `json:"q_uel_mvar"`
}

// NewEnvelopePoint converts one engine envelope point of a unit rated mva.
func NewEnvelopePoint(e limits.EnvelopePoint, mva float64) EnvelopePoint {
	return EnvelopePoint{
		PMW:                     e.P * mva,
		QMaxMvar:                bound(e.QMax, mva),
		QMaxLimit:               limitName(e.QMaxLimit),
		QMinMvar:                bound(e.QMin, mva),
		QMinLimit:               limitName(e.QMinLimit),
		QFieldMvar:              bound(e.Field, mva),
		QArmatureUpMvar:         bound(e.ArmatureUp, mva),
		QArmatureDownMvar:       bound(e.ArmatureDown, mva),
		QStabilityMvar:          bound(e.Stability, mva),
		QPracticalStabilityMvar: bound(e.Practical, mva),
		QEndRegionMvar:          bound(e.EndRegion, mva),
		QUELMvar:                bound(e.UEL, mva),
	}
}
