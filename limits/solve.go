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
// root of the previous sample, using the slope found there: a Newton step
// with that slope, stretched by a tenth so that it usually steps just past
// the root, gives a bracket that Brent's method closes in a few steps. It
// never looks above hi. ok is false when three such steps find no
// bracket; the caller then solves from its cold bracket.
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
		slope = 1
	}
	for range 3 {
		x1 := x0 - 1.1*f0/slope
		if x1 >= hi {
			x1 = hi
		}
		if x1 == x0 {
			return 0, 0, false
		}
		f1 := f(x1)
		if s := (f1 - f0) / (x1 - x0); s > 0 {
			slope = s
		}
		if (f0 > 0) != (f1 > 0) || f1 == 0 {
			a, b, fa, fb := x0, x1, f0, f1
			if a > b {
				a, b, fa, fb = b, a, fb, fa
			}
			r, ok := brent(f, a, b, fa, fb, stabTol)
			return r, slope, ok
		}
		x0, f0 = x1, f1
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
