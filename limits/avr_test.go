package limits

import (
	"testing"
)

// kundurUnit is the single-machine infinite-bus system of Kundur (1994),
// Examples 12.3 to 12.5, as remembered (from memory): four 555 MVA units
// lumped on a 2220 MVA base, Xd = 1.81, Xq = 1.76, X'd = 0.3,
// T'd0 = 8.0 s, H = 3.5 s, K_D = 0, through Xe = 0.65 (step-up 0.15 and
// one line of 0.5 in service) to the infinite bus; a thyristor exciter
// K_A = 200, T_R = 0.02 s. The example's exciter has no time constant;
// T_A = 0.001 s stands for it here.
func kundurUnit(t testing.TB, mod func(*Params)) *Unit {
	t.Helper()
	p := Params{Rotor: Round, Xd: 1.81, Xq: 1.76, Xl: 0.16, Xp: 0.16, Ra: 0.003,
		XdTransient: 0.3, InertiaHS: 3.5, PowerFactor: 0.9, FrequencyHz: 60, PMax: 1, Xe: 0.65,
		Basis: BasisAVR, Td0TransientS: 8, Exciter: &Exciter{KA: 200, TAS: 0.001, TRS: 0.02}}
	if mod != nil {
		mod(&p)
	}
	return mustNew(t, p)
}

func TestScratch(t *testing.T) {
	u := kundurUnit(t, nil)
	k := u.HeffronPhillips(0.9, 0.3, 1)
	t.Logf("%+v", k)
	m, ok, err := u.RotorMode(Point{P: 0.9, Q: 0.3, V: 1})
	t.Logf("%+v %v %v", m, ok, err)
	for _, p := range []float64{0, 0.3, 0.6, 0.9} {
		b := u.Bounds(p, 1, 1, 1, nil)
		t.Logf("p %v: %+v", p, b)
		iv, ok := u.avrTab.lookup(p, 1, b.QMax.V)
		t.Logf("  table %+v %v", iv, ok)
	}
}
