package limits

import "fmt"

// Limit names one of the limits that bound a generator's operation.
type Limit uint8

// The limits, in the order of Result.Margins. Their String values are the
// names used in the fleet file, the API and the metrics.
const (
	NoLimit            Limit = iota
	LimitArmature            // armature (stator) winding heating
	LimitField               // field (rotor) winding heating
	LimitStability           // practical steady-state stability limit
	LimitEndRegion           // stator end-region heating
	LimitPrimeMover          // prime-mover (turbine) active-power capability
	LimitVoltsPerHertz       // generator volts per hertz, 1.05 pu continuous
	LimitUEL                 // the regulator's underexcitation limiter curve
	numLimits
)

// NumLimits is the length of Result.Margins.
const NumLimits = int(numLimits)

var limitNames = [...]string{"none", "armature", "field", "stability", "end_region", "prime_mover", "volts_per_hertz", "uel"}

// String returns the limit's name: "armature", "field", "stability",
// "end_region", "prime_mover", "volts_per_hertz", "uel" or "none".
func (l Limit) String() string {
	if int(l) < len(limitNames) {
		return limitNames[l]
	}
	return fmt.Sprintf("Limit(%d)", uint8(l))
}

// Limits returns every limit that has a margin, in Margins order. It is
// an array, so the scrape-time loops over every unit allocate nothing.
func Limits() [numLimits - 1]Limit {
	return [...]Limit{LimitArmature, LimitField, LimitStability, LimitEndRegion, LimitPrimeMover, LimitVoltsPerHertz, LimitUEL}
}

// Zone is the IEC 60034-1 voltage and frequency operating zone.
type Zone uint8

const (
	ZoneA       Zone = iota // continuous operation at rated output
	ZoneB                   // permitted, with extra heating; limit the time spent
	ZoneOutside             // outside both zones
)

// String returns "A", "B" or "outside".
func (z Zone) String() string {
	switch z {
	case ZoneA:
		return "A"
	case ZoneB:
		return "B"
	}
	return "outside"
}

// Bound is a value that may not exist at an operating point: a limit
// curve that has no solution at this active power, or a quantity that
// needs a parameter the unit lacks. V is meaningless when OK is false.
type Bound struct {
	V  float64
	OK bool
}

func some(v float64) Bound { return Bound{V: v, OK: true} }

// Point is one operating point, in per unit on the machine base.
type Point struct {
	P, Q, V float64 // active power, reactive power (pu of rated MVA), terminal voltage (pu)

	F float64 // frequency, pu of rated; 0 means rated

	Ifd         float64 // measured field current, pu of IFag
	IfdMeasured bool    // Ifd holds a measurement

	// IfdDoubtful marks a measured field current the field margin may not
	// trust on its own: the sample's quality is QUESTIONABLE. The margin
	// then takes the larger of the measured and the model field current.
	IfdDoubtful bool
	// IfdMismatch is the fraction of the model's field current beyond
	// which a measurement that disagrees with the model is doubted in the
	// same way (the mismatch alarm's threshold); 0 means never.
	IfdMismatch float64

	Coolant    float64 // coolant quantity in the table's unit
	HasCoolant bool    // Coolant holds a value
}

// Bounds are the limit curves at one active power and terminal voltage,
// in pu. They do not depend on the reactive power of the point.
type Bounds struct {
	ArmatureUp   Bound // +sqrt((v i_max)^2 - p^2)
	ArmatureDown Bound // -sqrt((v i_max)^2 - p^2)
	Field        Bound // q at which the field current reaches its limit
	Stability    Bound // q_stability, the steady-state stability limit on the unit's basis
	Practical    Bound // practical stability limit: the lowest q of the stable interval, scanned up from Stability, where P_max - p >= the margin (PracticalLimit); = Stability when the margin is 0

	// StabilityTop is set where q_max itself is unstable: the top of the
	// topmost stable interval, to which q_max moves (QMaxLimit stability).
	StabilityTop Bound
	// StabilityErr is ErrSmallSignal where the avr basis' eigenvalue
	// solver failed: Stability and Practical are then absent, and the
	// point is reported infeasible with reason stability.
	StabilityErr error
	EndRegion    Bound // stator end-region curve at this voltage
	UEL          Bound // underexcitation limiter curve at this voltage

	QMax, QMin           Bound
	QMaxLimit, QMinLimit Limit // which limit binds; when the bound is absent, which limit makes it so
}

// Result is the full evaluation of one operating point, in per unit.
type Result struct {
	Bounds

	I        float64 // armature current, pu
	IfdModel float64 // model field current, pu of IFag
	// FieldCurrent is the field current the field margin is taken at, pu
	// of IFag: the measured one, the model's, or the larger of the two
	// when the measurement is doubtful (see Evaluate).
	FieldCurrent float64
	Ef           float64 // internal EMF behind Xd (unsaturated), pu

	IMax, IfdMax   float64 // continuous ratings at the present coolant: armature pu, field pu IFag
	CoolantOutside bool    // the sample's coolant value lies outside the table (clamped)

	PMax Bound // min(prime-mover p_max, sqrt((v i_max)^2 - q^2)), pu

	// Margins are ratios, positive inside the envelope, indexed by Limit.
	Margins [numLimits]Bound

	// QMaxPending is set by EvaluateSample when Field, QMax and QMaxLimit
	// (and, for a salient-pole unit, Stability) are left unsolved;
	// Complete solves them.
	QMaxPending bool

	// fast is set when the avr basis' stability limit came from the
	// unit's table (the per-sample path), so that Complete keeps to it.
	fast bool

	Binding    Limit // the capability-chart limit nearest the point, by distance in pu of rated MVA (see Evaluate)
	Feasible   bool  // every bound exists at this active power
	Infeasible Limit // when not feasible, the limit whose bound is missing

	VPerHz float64 // v / f, pu
	Zone   Zone
}

// Margin returns the margin of limit l.
func (r *Result) Margin(l Limit) Bound { return r.Margins[l] }
