package limits

// VoltsPerHertzLimit is the continuous volts-per-hertz capability of a
// generator on its own base, pu (IEEE C37.102 / IEEE C50.13, from memory).
const VoltsPerHertzLimit = 1.05

// VoltageFrequencyZone returns the operating zone of terminal voltage v
// and frequency f, both pu of rated: zone A within +/-5 % voltage and
// +/-2 % frequency; zone B within +/-8 % voltage and -5 %/+3 % frequency
// (IEC 60034-1, IEEE C50.13, from memory). The zones are taken as the
// rectangles the envelope contract fixes; volts per hertz is checked on
// its own margin.
func VoltageFrequencyZone(v, f float64) Zone {
	// The edges belong to the inner zone; eps absorbs the rounding of
	// v - 1 so that 1.05 pu is inside zone A.
	const eps = 1e-9
	dv, df := v-1, f-1
	switch {
	case dv >= -0.05-eps && dv <= 0.05+eps && df >= -0.02-eps && df <= 0.02+eps:
		return ZoneA
	case dv >= -0.08-eps && dv <= 0.08+eps && df >= -0.05-eps && df <= 0.03+eps:
		return ZoneB
	}
	return ZoneOutside
}
