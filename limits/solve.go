package limits

import "math"

// brent returns a root of f in the bracket [a, b], where fa = f(a) and
// fb = f(b) have opposite signs or one is zero. It is Brent's method
// (inverse quadratic interpolation and secant steps, safeguarded by
// bisection; R. P. Brent, Algorithms for Minimization without Derivatives,
// 1973, ch. 4), so it never leaves the bracket and converges at least as
// fast as bisection. ok is false when the bracket holds no sign change.
func brent(f func(float64) float64, a, b, fa, fb, tol float64) (root float64, ok bool) {
	if fa == 0 {
		return a, true
	}
	if fb == 0 {
		return b, true
	}
	if (fa > 0) == (fb > 0) {
		return 0, false
	}
	c, fc := b, fb
	var d, e float64
	for range 200 {
		if (fb > 0) == (fc > 0) {
			c, fc = a, fa
			d = b - a
			e = d
		}
		if math.Abs(fc) < math.Abs(fb) {
			a, b, c = b, c, b
			fa, fb, fc = fb, fc, fb
		}
		tol1 := 2*0x1p-52*math.Abs(b) + 0.5*tol
		xm := 0.5 * (c - b)
		if math.Abs(xm) <= tol1 || fb == 0 {
			return b, true
		}
		if math.Abs(e) >= tol1 && math.Abs(fa) > math.Abs(fb) {
			s := fb / fa
			var p, q float64
			if a == c {
				p = 2 * xm * s
				q = 1 - s
			} else {
				q = fa / fc
				r := fb / fc
				p = s * (2*xm*q*(q-r) - (b-a)*(r-1))
				q = (q - 1) * (r - 1) * (s - 1)
			}
			if p > 0 {
				q = -q
			} else {
				p = -p
			}
			if 2*p < math.Min(3*xm*q-math.Abs(tol1*q), math.Abs(e*q)) {
				e = d
				d = p / q
			} else {
				d = xm
				e = d
			}
		} else {
			d = xm
			e = d
		}
		a, fa = b, fb
		if math.Abs(d) > tol1 {
			b += d
		} else {
			b += math.Copysign(tol1, xm)
		}
		fb = f(b)
	}
	return b, true
}

// stabTol is the tolerance, in pu of reactive power, of the stability
// limits, which are found by bracketing rather than Newton steps: far
// below the 0.1 % agreement the envelope contract asks for (the field
// limit's Newton iteration stops nearer still, see fieldLimit).
const stabTol = 1e-9

// warmRoot looks for the root of an increasing function f near hint, the
// root of the previous sample, by secant steps that start from the slope
// found there: the first step is a Newton step with that slope, and each
// later one uses the last two points. Near a simple root this converges
// superlinearly, so a slowly moving operating point needs three or four
// evaluations. It never looks above hi. ok is false when the steps do
// not settle (a kink, a slope of the wrong sign, a far jump); the caller
// then solves from its cold bracket, which is always safe.
func warmRoot(f func(float64) float64, hint, slope, hi float64) (root, newSlope float64, ok bool) {
	if !(hint < hi) {
		return 0, 0, false
	}
	x0 := hint
	f0 := f(x0)
	if f0 == 0 {
		return x0, slope, true
	}
	if !(slope > 0) {
		// No slope known yet (the last root came from the cold path):
		// measure it here.
		const h = 1e-6
		slope = (f(x0+h) - f0) / h
		if !(slope > 0) {
			return 0, 0, false
		}
	}
	x1 := x0 - f0/slope
	for range 6 {
		if !(x1 < hi) || math.Abs(x1-hint) > 0.2 {
			return 0, 0, false
		}
		f1 := f(x1)
		if f1 == 0 {
			return x1, slope, true
		}
		s := (f1 - f0) / (x1 - x0)
		if !(s > 0) {
			return 0, 0, false
		}
		slope = s
		x2 := x1 - f1/s
		// The secant error shrinks as e(n+1) ~ C e(n) e(n-1): after a step
		// of 1e-7 the new point is within about C 1e-7 e(n-1) of the root,
		// under 1e-10 pu for the moves of tracking (e(n-1) ~ 1e-4) and a
		// few 1e-8 pu at worst (the 0.2 pu jump bound), far inside the
		// envelope contract's 0.1 %; so it is taken without another
		// evaluation.
		if math.Abs(x2-x1) <= 1e-7 {
			return x2, slope, true
		}
		x0, f0, x1 = x1, f1, x2
	}
	return 0, 0, false
}

// quadLower returns the lower real root of a u^2 + b u + c = 0 with
// a >= 0, written to avoid cancellation; with a = 0 it solves the linear
// equation (b != 0). ok is false when there is no real root.
func quadLower(a, b, c float64) (float64, bool) {
	if a == 0 {
		if b == 0 {
			return 0, false
		}
		return -c / b, true
	}
	disc := b*b - 4*a*c
	if disc < 0 {
		return 0, false
	}
	sq := math.Sqrt(disc)
	if b <= 0 {
		den := -b + sq
		if den == 0 {
			return 0, true
		}
		return 2 * c / den, true
	}
	return (-b - sq) / (2 * a), true
}
