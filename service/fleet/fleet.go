// Package fleet reads the fleet file: the YAML description of every
// generator genvelope watches. It keeps each unit's values in the
// engineering units of the file (MVA, kV, MW, Mvar, A), builds the per-unit
// engine model of package limits for it, and reports every problem it finds
// with the file line it comes from.
//
// A fleet file has one top-level key, units:, a list of units. Each unit
// has the keys id, name, site, rating, machine, field, prime_mover, grid,
// excitation, stabilizer, stability, end_region, coolant, protection,
// transformer and alarms; see deploy/examples/fleet.yaml.
package fleet

import (
	"context"
	"fmt"
	"os"
	"runtime"
	"strings"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
)

// Caution is the sentence every output that gives numbers about operating
// a machine carries: command-line reports, charts and web pages.
const Caution = "genvelope advises only: the manufacturer's data, local grid codes and licensed engineers decide how a machine is operated and protected."

// Fleet is every unit of one fleet file.
type Fleet struct {
	File  string  // the name the fleet was parsed under
	Units []*Unit // in file order

	// Alarms are the alarm settings of units that give none of their own:
	// alarm.Defaults() with the file's top-level alarms: block on top.
	Alarms [alarm.NumKinds]alarm.Setting

	byID map[string]*Unit
}

// Unit returns the unit with the given id, or nil.
func (f *Fleet) Unit(id string) *Unit {
	if f == nil {
		return nil
	}
	return f.byID[id]
}

// IDs returns the ids of the units in file order.
func (f *Fleet) IDs() []string {
	if f == nil {
		return nil
	}
	ids := make([]string, 0, len(f.Units))
	for _, u := range f.Units {
		ids = append(ids, u.ID)
	}
	return ids
}

// Unit is one generator of the fleet file. The values are those of the
// file in engineering units, with the defaults filled in. Model is the
// engine model in per unit on the machine base; it is nil when the unit has
// errors.
type Unit struct {
	ID   string
	Name string // display name; "" when not given (see DisplayName)
	Site string // "" when not given

	Rating     Rating
	Machine    Machine
	Field      Field
	PrimeMover PrimeMover
	Grid       Grid
	Excitation *Excitation // nil when not given
	Stabilizer *Stabilizer // nil when not given
	Stability  Stability
	EndRegion  *EndRegion // nil when not given
	Coolant    *Coolant   // nil when not given

	// The limiters (excitation.oel, scl, vhz_limiter), the protection and
	// the step-up transformer, for the coordination study.
	Limiters     Limiters
	Protection   Protection
	Transformer  *Transformer // nil when not given
	Plausibility Plausibility // the values it can physically report; zero fields take the defaults

	// Alarms are the unit's alarm settings: the fleet's, with the unit's
	// own alarms: block on top.
	Alarms [alarm.NumKinds]alarm.Setting

	Base  limits.Base  // converts between the units of the file and per unit
	Model *limits.Unit // the engine model; nil when the unit has errors

	line  int        // line of the unit's list entry
	paths *pathTable // the fleet file's dotted key paths, numbered
	lines []keyLine  // the line of each key given, by path number
}

// setLine records the line of the key at path number n (a later record
// of the same path wins, see lineOf).
func (u *Unit) setLine(n, line int) {
	u.lines = append(u.lines, keyLine{uint32(n), int32(line)})
}

// lineOf returns the line of the key at the dotted path field, if given.
func (u *Unit) lineOf(field string) (int, bool) {
	if u.paths == nil {
		return 0, false
	}
	n, ok := u.paths.ids[field]
	if !ok {
		return 0, false
	}
	for i := len(u.lines) - 1; i >= 0; i-- {
		if u.lines[i].path == uint32(n) {
			return int(u.lines[i].line), true
		}
	}
	return 0, false
}

// DisplayName returns the name, or the id when no name is given.
func (u *Unit) DisplayName() string {
	if u.Name != "" {
		return u.Name
	}
	return u.ID
}

// Line returns the line of the key at the dotted path field (for example
// "rating.mva" or "end_region.points[2].p_mw", points counted from 1). For
// a key that is absent it returns the line of the nearest enclosing key
// that is present, and at worst the line where the unit starts.
func (u *Unit) Line(field string) int {
	for field != "" {
		if l, ok := u.lineOf(field); ok {
			return l
		}
		i := strings.LastIndexAny(field, ".[")
		if i < 0 {
			break
		}
		field = field[:i]
	}
	return u.line
}

// ForgetLines drops the line numbers of every unit's keys, which only
// diagnostics need, to save memory in a long-running service; Line then
// returns the line where each unit starts.
func (f *Fleet) ForgetLines() {
	for _, u := range f.Units {
		u.lines = nil
	}
}

// Has reports whether the key at the dotted path field is in the file (as
// opposed to taking its default).
func (u *Unit) Has(field string) bool {
	_, ok := u.lineOf(field)
	return ok
}

// Rating is the nameplate rating.
type Rating struct {
	MVA         float64 // rated apparent power
	KV          float64 // rated line-line terminal voltage
	PowerFactor float64 // rated power factor, (0, 1]
	FrequencyHz float64 // rated frequency
	Poles       int     // number of poles, positive and even; 0 when not given
}

// RatedMW returns the rated active power, MVA times power factor.
func (r Rating) RatedMW() float64 { return r.MVA * r.PowerFactor }

// SpeedRPM returns the synchronous speed, 120 f / poles; 0 when the
// number of poles is not given.
func (r Rating) SpeedRPM() float64 {
	if r.Poles <= 0 {
		return 0
	}
	return 120 * r.FrequencyHz / float64(r.Poles)
}

// Machine holds the reactances and constants, in pu on the machine base.
type Machine struct {
	Rotor       limits.Rotor
	Xd          float64 // unsaturated direct-axis synchronous reactance
	Xq          float64 // quadrature-axis synchronous reactance (xd when not given on a round rotor)
	Xl          float64 // armature leakage reactance
	Xp          float64 // Potier reactance (xl when not given)
	Ra          float64 // armature resistance (0 when not given)
	XdTransient float64 // direct-axis transient reactance; 0 when not given
	InertiaHS   float64 // inertia constant H on machine base, s; 0 when not given
	Saturation  *Saturation

	Td0TransientS float64 // open-circuit d-axis transient time constant T'd0, s; 0 when not given
	DampingPU     float64 // mechanical damping D, pu torque per pu speed; 0 when not given
}

// Excitation is the voltage regulator and exciter (envelope.md, "The
// linearized model"), field voltage in pu of the air-gap-line field.
type Excitation struct {
	KA       float64 // regulator gain, pu/pu
	TAS      float64 // exciter time constant, s
	TRS      float64 // voltage transducer time constant, s; 0 when not given
	EfdMinPU float64 // lowest field voltage; 0 when not given
	EfdMaxPU float64 // ceiling field voltage; 0 when not given (reported only)
	UEL      *UEL    // the underexcitation limiter; nil when not given
}

// UEL is the underexcitation limiter curve at 1.0 pu voltage, in the
// file's MW and Mvar (coordination.md, "Inputs").
type UEL struct {
	Shape limits.UELShape

	// circle
	CenterPMW, CenterQMvar, RadiusMvar float64
	VoltageExponent                    float64 // 2 when not given

	// points
	Points                             []UELPoint
	VoltageExponentP, VoltageExponentQ float64 // 2 when not given
}

// CurvePoint is one point (P, Q) of a curve in the P-Q plane, with the
// line of the fleet file it was read from.
type CurvePoint struct {
	PMW, QMvar float64
	Line       int
}

// UELPoint is one point of a UEL curve given by points.
type UELPoint = CurvePoint

// Stabilizer is a speed-input power system stabilizer: gain and time
// constants in s (two lead-lag stages; t3_s = t4_s for one).
type Stabilizer struct {
	K, TWS, T1S, T2S, T3S, T4S float64
}

// Saturation holds the open-circuit saturation factors S(1.0) and S(1.2).
type Saturation struct {
	S10, S12 float64
}

// Field describes the field winding in amperes.
type Field struct {
	AirGapA float64 // IFag: field current on the air-gap line at rated voltage
	RatedA  float64 // continuous rated field current; 0 when not given
}

// PrimeMover holds the turbine's active-power range.
type PrimeMover struct {
	PMaxMW, PMinMW float64
}

// Grid describes the connection to the system.
type Grid struct {
	XExternalPU float64 // reactance to the infinite bus, pu on machine base; 0 when not given
}

// Stability holds the settings of the steady-state stability limit.
type Stability struct {
	Basis          limits.Basis // avr when the unit has an excitation: block, else manual, unless given
	ZetaMin        float64      // lowest damping ratio of an electromechanical mode on the avr basis; 0 when not given
	MarginFraction float64      // practical margin as a fraction of rated MW; 0 when not given
}

// EndRegion is the maker's stator end-region curve.
type EndRegion struct {
	VoltageExponent float64 // the curve scales with v^k; 0 when not given
	Points          []EndRegionPoint
}

// EndRegionPoint is one point of the end-region curve.
type EndRegionPoint = CurvePoint

// CoolantQuantity names what a coolant table is indexed by.
type CoolantQuantity string

// The coolant quantities a fleet file may name.
const (
	HydrogenPressureKPa CoolantQuantity = "hydrogen_pressure_kpa"
	ColdGasC            CoolantQuantity = "cold_gas_c"
	AmbientC            CoolantQuantity = "ambient_c"
)

// CoolantQuantities returns the allowed coolant quantities.
func CoolantQuantities() []CoolantQuantity {
	return []CoolantQuantity{HydrogenPressureKPa, ColdGasC, AmbientC}
}

// Unit returns the engineering unit of the quantity: "kPa" or "°C".
func (q CoolantQuantity) Unit() string {
	if q == HydrogenPressureKPa {
		return "kPa"
	}
	return "°C"
}

// Coolant is a capability table against a coolant quantity.
type Coolant struct {
	Quantity CoolantQuantity
	Points   []CoolantPoint
}

// CoolantPoint is one row of the coolant table: the factors multiplying
// the armature and field continuous ratings at coolant value At.
type CoolantPoint struct {
	At, Armature, Field float64
	Line                int
}

// Load reads and parses the fleet file at path. The error is for a file
// that cannot be read; problems in its content are in the Diagnostics.
func Load(path string) (*Fleet, Diagnostics, error) {
	return LoadContext(context.Background(), path)
}

// LoadContext is Load, stopped by ctx: the error is then ctx's, and
// neither a fleet nor diagnostics are returned.
func LoadContext(ctx context.Context, path string) (*Fleet, Diagnostics, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, nil, fmt.Errorf("fleet file: %w", err)
	}
	return ParseContext(ctx, path, data)
}

// Parse parses a fleet file's content; name is used in the diagnostics.
// It collects every problem it finds, in line order. The Fleet is never
// nil: it holds every unit that could be read, and a unit with errors has
// a nil Model. Use the fleet only when the Diagnostics have no errors.
func Parse(name string, data []byte) (*Fleet, Diagnostics) {
	f, ds, _ := ParseContext(context.Background(), name, data)
	return f, ds
}

// ParseContext is Parse, stopped by ctx: the error is then ctx's, and
// neither a fleet nor diagnostics are returned. The engine models are
// built concurrently (buildAll); the result, diagnostics included, is
// the same as one built in file order.
func ParseContext(ctx context.Context, name string, data []byte) (*Fleet, Diagnostics, error) {
	return parse(ctx, name, data, runtime.GOMAXPROCS(0))
}

// parse is ParseContext building the models on up to workers goroutines.
func parse(ctx context.Context, name string, data []byte, workers int) (*Fleet, Diagnostics, error) {
	d := &decoder{file: name, workers: workers}
	f := &Fleet{File: name, byID: map[string]*Unit{}, Alarms: alarm.Defaults()}
	d.document(data, f)
	for _, u := range f.Units {
		if !u.Has("alarms") {
			u.Alarms = f.Alarms
		}
	}
	if err := d.buildAll(ctx, workers); err != nil {
		return nil, nil, err
	}
	d.diags.sortByLine()
	return f, d.diags, nil
}
