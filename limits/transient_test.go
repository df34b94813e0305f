package limits

import (
	"math"
	"testing"
)

// swingStable integrates the classical swing equation
// (2H/ws) d2(delta)/dt2 = p - Pe with fourth-order Runge-Kutta: Pe = 0
// until tc (a fault that passes no power), Pe = pMax sin(delta) after.
// It reports whether the rotor swings back (the speed deviation returns
// to zero before delta passes pi - delta0). Written for this test; it
// shares no code with the package.
func swingStable(h, ws, p, pMax, d0, tc float64) bool {
	const dt = 1e-4
	d, w := d0, 0.0 // angle, rad; speed deviation, rad/s
	acc := func(t, d float64) float64 {
		pe := pMax * math.Sin(d)
		if t < tc {
			pe = 0
		}
		return ws / (2 * h) * (p - pe)
	}
	for t := 0.0; t < 10; t += dt {
		k1d, k1w := w, acc(t, d)
		k2d, k2w := w+dt/2*k1w, acc(t+dt/2, d+dt/2*k1d)
		k3d, k3w := w+dt/2*k2w, acc(t+dt/2, d+dt/2*k2d)
		k4d, k4w := w+dt*k3w, acc(t+dt, d+dt*k3d)
		d += dt / 6 * (k1d + 2*k2d + 2*k3d + k4d)
		w += dt / 6 * (k1w + 2*k2w + 2*k3w + k4w)
		if d > math.Pi-d0 {
			return false
		}
		if t > tc && w < 0 {
			return true
		}
	}
	return true
}

// The critical clearing time from the equal-area criterion
// (cos d_cr = (pi - 2 d0) sin d0 - cos d0; textbook, e.g. Kundur 1994,
// ch. 13) against the clearing time found by bisection on an RK4
// integration of the swing equation.
func TestCriticalClearingTimeAgainstRK4(t *testing.T) {
	u, err := New(Params{Rotor: Round, Xd: 2.0, Xq: 2.0, Xl: 0.15, Xp: 0.15, PowerFactor: 0.85,
		FrequencyHz: 50, PMax: 1, Xe: 0.3, MarginFraction: 0.1, XdTransient: 0.3, InertiaHS: 4})
	if err != nil {
		t.Fatal(err)
	}
	for _, pq := range [][2]float64{{0.85, 0.5}, {0.5, 0.1}, {0.3, -0.1}, {0.9, 0.2}} {
		p, q := pq[0], pq[1]
		got := u.CriticalClearingTime(p, q, 1)
		if !got.OK {
			t.Fatalf("p %v q %v: no clearing time", p, q)
		}
		// The classical-model operating point, computed here from phasors.
		i := complex(p, -q)
		e := 1 + complex(0, 0.3)*i
		vs := 1 - complex(0, 0.3)*i
		d0 := math.Atan2(imag(e), real(e)) - math.Atan2(imag(vs), real(vs))
		pMax := abs(e) * abs(vs) / 0.6
		ws := 2 * math.Pi * 50
		lo, hi := 0.0, 2.0
		for range 40 {
			mid := (lo + hi) / 2
			if swingStable(4, ws, p, pMax, d0, mid) {
				lo = mid
			} else {
				hi = mid
			}
		}
		if math.Abs(got.V-lo)/lo > 0.005 {
			t.Errorf("p %v q %v: t_cr = %.4f s, RK4 bisection gives %.4f s", p, q, got.V, lo)
		}
	}
}

func abs(z complex128) float64 { return math.Hypot(real(z), imag(z)) }

func TestCriticalClearingTimeAbsent(t *testing.T) {
	u := roundUnit(t, 2, 0.2, nil) // no Xd', no H
	if u.CriticalClearingTime(0.5, 0.1, 1).OK {
		t.Error("clearing time without Xd' and H must be absent")
	}
	v := benchRound(t)
	if v.CriticalClearingTime(0, 0.1, 1).OK || v.CriticalClearingTime(-0.1, 0.1, 1).OK {
		t.Error("clearing time at p <= 0 must be absent")
	}
}
