package limits

import "testing"

// Voltage and frequency zones (IEC 60034-1, IEEE C50.13, from memory):
// zone A +/-5 % voltage and +/-2 % frequency; zone B +/-8 % voltage and
// -5 %/+3 % frequency. Volts per hertz 1.05 pu continuous (IEEE C37.102,
// IEEE C50.13, from memory).
func TestVoltageFrequencyZone(t *testing.T) {
	for _, tc := range []struct {
		v, f float64
		want Zone
	}{
		{1, 1, ZoneA}, {1.05, 1.02, ZoneA}, {0.95, 0.98, ZoneA},
		{1.051, 1, ZoneB}, {0.949, 1, ZoneB}, {1, 1.021, ZoneB}, {1, 0.979, ZoneB},
		{1.08, 1.03, ZoneB}, {0.92, 0.95, ZoneB},
		{1.081, 1, ZoneOutside}, {0.919, 1, ZoneOutside}, {1, 1.031, ZoneOutside}, {1, 0.949, ZoneOutside},
	} {
		if got := VoltageFrequencyZone(tc.v, tc.f); got != tc.want {
			t.Errorf("zone(v %v, f %v) = %v, want %v", tc.v, tc.f, got, tc.want)
		}
	}
}

func TestVoltsPerHertzMargin(t *testing.T) {
	u := benchRound(t)
	for _, tc := range []struct{ v, f, want float64 }{
		{1.05, 1, 0}, {1, 1, 1 - 1/1.05}, {1.05, 0.95, 1 - (1.05/0.95)/1.05},
	} {
		r := u.Evaluate(Point{P: 0.5, Q: 0.1, V: tc.v, F: tc.f}, nil)
		near(t, "volts-per-hertz margin", r.Margins[LimitVoltsPerHertz].V, tc.want, 1e-12)
	}
}
