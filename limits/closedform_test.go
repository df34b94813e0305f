package limits

import (
	"math"
	"testing"
)

// Units for the closed-form checks. Their parameters are arbitrary
// round numbers chosen for the test; the expected values come from the
// textbook identities named beside each check, never from this package.

func roundUnit(t testing.TB, xd, xe float64, mod func(*Params)) *Unit {
	t.Helper()
	p := Params{Rotor: Round, Xd: xd, Xq: xd, Xl: 0.15, Xp: 0.15, PowerFactor: 0.85,
		FrequencyHz: 50, PMax: 1, Xe: xe, MarginFraction: 0.1}
	if mod != nil {
		mod(&p)
	}
	u, err := New(p)
	if err != nil {
		t.Fatal(err)
	}
	return u
}

func salientUnit(t testing.TB, xd, xq, xe float64) *Unit {
	t.Helper()
	u, err := New(Params{Rotor: Salient, Xd: xd, Xq: xq, Xl: 0.15, Xp: 0.15, PowerFactor: 0.9,
		FrequencyHz: 50, PMax: 1, Xe: xe, MarginFraction: 0.1})
	if err != nil {
		t.Fatal(err)
	}
	return u
}

// general returns a copy of u that takes the iterative stability path
// even when Xq = Xd, so the closed forms can be checked against it.
func general(u *Unit) *Unit {
	g := *u
	g.roundStab = false
	return &g
}

func near(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if math.IsNaN(got) || math.Abs(got-want) > tol {
		t.Errorf("%s = %.12g, want %.12g (tolerance %g)", what, got, want, tol)
	}
}

// Round-rotor field limit, unsaturated, ra = 0: a circle with centre
// (0, -v^2/Xd) and radius v E/Xd (textbook machine theory, e.g. Kundur,
// Power System Stability and Control, 1994).
func TestFieldLimitCircle(t *testing.T) {
	for _, tc := range []struct{ xd, ifdRated, v float64 }{
		{2.0, 2.6, 1.0}, {1.8, 2.4, 0.95}, {2.3, 3.0, 1.05},
	} {
		u := roundUnit(t, tc.xd, 0, func(p *Params) { p.IfdRated = tc.ifdRated })
		for _, p := range []float64{0, 0.3, 0.6, 0.9} {
			b := u.Bounds(p, tc.v, 1, 1, nil)
			r := tc.v * tc.ifdRated / tc.xd
			want := -tc.v*tc.v/tc.xd + math.Sqrt(r*r-p*p)
			if !b.Field.OK {
				t.Fatalf("xd %v p %v: no field limit", tc.xd, p)
			}
			near(t, "field-limit q", b.Field.V, want, 1e-9)
		}
	}
}

// Theoretical steady-state stability limit of a round rotor through Xe:
// circle with centre (0, (v^2/2)(1/Xe - 1/Xd)) and radius
// (v^2/2)(1/Xe + 1/Xd); at p = 0, q = -v^2/Xd (textbook machine theory;
// IEEE C37.102, from memory). Both the closed form and the iterative
// (two-reaction) path are checked.
func TestStabilityCircle(t *testing.T) {
	for _, tc := range []struct{ xd, xe, v float64 }{
		{2.0, 0.2, 1.0}, {1.8, 0.35, 1.0}, {2.2, 0.1, 0.95}, {1.9, 0.5, 1.05},
	} {
		u := roundUnit(t, tc.xd, tc.xe, func(p *Params) { p.IfdRated = 3 })
		c := tc.v * tc.v / 2 * (1/tc.xe - 1/tc.xd)
		rad := tc.v * tc.v / 2 * (1/tc.xe + 1/tc.xd)
		for _, p := range []float64{0, 0.25, 0.5, 0.8} {
			want := c - math.Sqrt(rad*rad-p*p)
			for _, m := range []*Unit{u, general(u)} {
				b := m.Bounds(p, tc.v, 1, 1, nil)
				if !b.Stability.OK {
					t.Fatalf("xd %v xe %v p %v: no stability limit", tc.xd, tc.xe, p)
				}
				near(t, "stability q", b.Stability.V, want, 1e-7)
			}
		}
		near(t, "stability q at p = 0", u.Bounds(0, tc.v, 1, 1, nil).Stability.V, -tc.v*tc.v/tc.xd, 1e-12)
	}
}

// With Xe = 0 the round-rotor limit is the line q = -v^2/Xd (the circle's
// limit as Xe -> 0; textbook machine theory).
func TestStabilityNoExternalReactance(t *testing.T) {
	u := roundUnit(t, 2.0, 0, func(p *Params) { p.IfdRated = 3 })
	for _, p := range []float64{0, 0.4, 0.8} {
		near(t, "closed form", u.Bounds(p, 1, 1, 1, nil).Stability.V, -0.5, 1e-12)
		near(t, "iterative", general(u).Bounds(p, 1, 1, 1, nil).Stability.V, -0.5, 1e-8)
	}
}

// Two-reaction theory (textbook): with no field (E_f = 0) and Xe = 0 a
// salient-pole machine carries the reluctance power
// P = (v^2/2)(1/Xq - 1/Xd) sin(2 delta), which peaks at delta = 45 degrees,
// where Q = -v^2 (cos^2 delta/Xd + sin^2 delta/Xq) = -(v^2/2)(1/Xd + 1/Xq).
// At that p the theoretical limit (K_s <= 0 or E_f <= 0) is that point;
// at p = 0 it is E_f = 0 at delta = 0, q = -v^2/Xd.
func TestSalientReluctance(t *testing.T) {
	for _, tc := range []struct{ xd, xq, v float64 }{{1.0, 0.65, 1.0}, {1.1, 0.7, 1.03}, {0.95, 0.6, 0.97}} {
		u := salientUnit(t, tc.xd, tc.xq, 0)
		v2 := tc.v * tc.v
		pPeak := v2 / 2 * (1/tc.xq - 1/tc.xd)
		b := u.Bounds(pPeak, tc.v, 1, 1, nil)
		near(t, "q at the reluctance peak", b.Stability.V, -v2/2*(1/tc.xd+1/tc.xq), 1e-6)
		s := u.stab(pPeak, b.Stability.V, tc.v)
		near(t, "angle at the reluctance peak, degrees", math.Atan2(s.sinD, s.cosD)*180/math.Pi, 45, 1e-3)
		near(t, "q at p = 0", u.Bounds(0, tc.v, 1, 1, nil).Stability.V, -v2/tc.xd, 1e-8)
		near(t, "reluctance peak, pu", peakPower(0, pPeak), pPeak, 1e-12)
	}
}

// The power-angle curve through the operating point: at the point's own
// E_f, V_s and delta, P(delta) must return p (the network is lossless).
// Independent of the stability search; checks the two-reaction algebra.
func TestPowerAngleThroughPoint(t *testing.T) {
	u := salientUnit(t, 1.05, 0.68, 0.2)
	for _, pq := range [][2]float64{{0.5, 0.2}, {0.8, -0.1}, {0.2, 0.4}, {0.9, 0.3}} {
		s := u.stab(pq[0], pq[1], 1)
		pe := s.a*s.sinD + s.b*2*s.sinD*s.cosD
		near(t, "P(delta)", pe, pq[0], 1e-12)
	}
}

// The peak of a sin d + b sin 2d against a dense scan done here.
func TestPeakPower(t *testing.T) {
	for _, ab := range [][2]float64{{1, 0}, {1, 0.2}, {0.3, 0.5}, {2, 0.05}, {0, 1}} {
		best := 0.0
		for i := 0; i <= 200000; i++ {
			d := math.Pi * float64(i) / 200000
			best = math.Max(best, ab[0]*math.Sin(d)+ab[1]*math.Sin(2*d))
		}
		near(t, "peak", peakPower(ab[0], ab[1]), best, 1e-9)
	}
}

// Saturation S(E) = B (E - A)^2 / E through S(1.0) and S(1.2)
// (IEEE Std 1110, IEEE Std 421.5, from memory): the curve must pass
// through both given points.
func TestSaturationThroughPoints(t *testing.T) {
	for _, s := range [][2]float64{{0.09, 0.32}, {0.12, 0.38}, {0.05, 0.2}, {0.15, 0.45}} {
		u := roundUnit(t, 2, 0, func(p *Params) { p.S10, p.S12 = s[0], s[1] })
		near(t, "S(1.0)", u.Saturation(1.0), s[0], 1e-12)
		near(t, "S(1.2)", u.Saturation(1.2), s[1], 1e-12)
		if u.Saturation(u.satA*0.999) != 0 {
			t.Errorf("S below A must be 0")
		}
	}
}

// Field current at load (IEEE Std 115, from memory): air-gap-line field
// current plus the saturation increment at the Potier voltage. At
// no load, rated voltage, the model gives IFag (1 pu) times (1 + S(1.0)),
// the definition of the saturation factor at rated voltage.
func TestFieldCurrentNoLoad(t *testing.T) {
	u := roundUnit(t, 2, 0, func(p *Params) { p.S10, p.S12 = 0.1, 0.35 })
	near(t, "i_fd at no load", u.FieldCurrent(0, 0, 1), 1.1, 1e-12)
	s := salientUnit(t, 1.0, 0.65, 0)
	near(t, "i_fd at no load, salient, unsaturated", s.FieldCurrent(0, 0, 1), 1, 1e-12)
}

// Round rotor, ra = 0: E_f = |V + jXd I|, a phasor identity; the
// salient form with Xq = Xd must reduce to it.
func TestEfRoundIdentity(t *testing.T) {
	u := roundUnit(t, 2.0, 0, nil)
	for _, pq := range [][2]float64{{0.8, 0.5}, {0.3, -0.2}, {0, 0.4}} {
		p, q := pq[0], pq[1]
		e := complex(1, 0) + complex(0, 2.0)*complex(p, -q)
		near(t, "E_f", u.field(p, q, 1, false).ef, math.Hypot(real(e), imag(e)), 1e-12)
	}
}

// The analytic derivative of the field current used by Newton's method,
// against a central difference.
func TestFieldDerivative(t *testing.T) {
	for _, u := range []*Unit{benchRound(t), benchSalient(t)} {
		for _, pq := range [][2]float64{{0.8, 0.5}, {0.3, -0.2}, {0.6, 0.1}} {
			p, q := pq[0], pq[1]
			const h = 1e-6
			fd := (u.FieldCurrent(p, q+h, 1.02) - u.FieldCurrent(p, q-h, 1.02)) / (2 * h)
			near(t, "d i_fd/dq", u.field(p, q, 1.02, true).dIfd, fd, 1e-7)
		}
	}
}
