package vecmath

import "math"

// The kernels evaluate in float64 and round once to float32 at the end. On
// amd64 and arm64 a scalar float64 multiply or add costs the same as a
// float32 one, and the extra 29 bits keep every intermediate rounding far
// below the final one, so each result is the correctly rounded value of the
// exact function except when the exact value lies within about 2^-10 ulp of
// a midpoint between two float32 numbers. The measured maximum error of each
// kernel, against the float64 functions of package math over a dense sweep
// of all float32 inputs, is stated on the function and checked by the
// tests.

const (
	log2e = 1.4426950408889634 // 1/ln 2
	ln2   = 0.6931471805599453 // ln 2 rounded to float64
	// shifter is 1.5 * 2^52: adding it to a float64 of magnitude below
	// 2^51 rounds the value to an integer held in the low mantissa bits.
	shifter = 0x1.8p52
	sqrt2   = 1.4142135623730951
)

// Taylor coefficients 1/k! of exp, k = 2..9.
const (
	c2 = 1.0 / 2
	c3 = 1.0 / 6
	c4 = 1.0 / 24
	c5 = 1.0 / 120
	c6 = 1.0 / 720
	c7 = 1.0 / 5040
	c8 = 1.0 / 40320
	c9 = 1.0 / 362880
)

// expm1Reduced returns exp(r) - 1 for |r| <= ln2/2 by its Taylor series to
// degree 9. The truncation error is below |r|^10/10! <= 7e-12 (2^-37)
// relative to exp(r), and below 2^-36 relative to exp(r) - 1 itself, since
// |exp(r) - 1| >= 0.84*|r| on that interval.
func expm1Reduced(r float64) float64 {
	return r * (1 + r*(c2+r*(c3+r*(c4+r*(c5+r*(c6+r*(c7+r*(c8+r*c9))))))))
}

// reduce splits y = k*ln2 + r with integer k and |r| <= ln2/2 (plus a
// rounding of order 1e-16). y must be finite with |y| < 2^40.
func reduce(y float64) (k int64, r float64) {
	t := y*log2e + shifter
	k = int64(math.Float64bits(t)<<12) >> 12 // the low 52 bits, sign-extended
	kf := t - shifter
	// kf*ln2 has a relative error of 2^-53 from ln2's rounding: with
	// |k| <= 150 that is below 2e-14 absolute, 2^-45 relative to exp(y).
	return k, y - kf*ln2
}

// pow2 returns 2^k for -1022 <= k <= 1023.
func pow2(k int64) float64 {
	return math.Float64frombits(uint64(k+1023) << 52)
}

// Exp32 returns e^x rounded to float32. Special cases are those of math.Exp:
// Exp32(+Inf) = +Inf, Exp32(-Inf) = 0, Exp32(NaN) = NaN; results beyond the
// float32 range overflow to +Inf (x > 88.72284) or round to a subnormal or
// to zero (x < -87.33655).
//
// Error: at most 0.51 ulp (measured maximum 0.5000 ulp over the sweeps of
// the tests); exact for x = 0.
func Exp32(x float32) float32 {
	switch {
	case x != x:
		return x
	case x > 89: // e^89 > MaxFloat32: +Inf, as float32 rounding would give
		return float32(math.Inf(1))
	case x < -104: // e^-104 < 2^-150, below half the smallest subnormal
		return 0
	}
	k, r := reduce(float64(x))
	return float32((1 + expm1Reduced(r)) * pow2(k))
}

// expm1x64 returns e^y - 1 for finite y with |y| <= 100, with a relative
// error below 2^-34: the float64 core of Tanh32.
func expm1x64(y float64) float64 {
	k, r := reduce(y)
	if k == 0 {
		return expm1Reduced(r)
	}
	// exp(y) - 1 with exp(y) >= sqrt(2) or <= 1/sqrt(2): the subtraction
	// loses at most a factor 1/(1 - 1/sqrt(2)) ~ 3.4 of relative accuracy.
	return (1+expm1Reduced(r))*pow2(k) - 1
}

// Log1p32 returns log(1 + x) rounded to float32. Special cases are those of
// math.Log1p: Log1p32(-1) = -Inf, Log1p32(x < -1) = NaN, Log1p32(+Inf) =
// +Inf, Log1p32(NaN) = NaN, Log1p32(±0) = ±0.
//
// Error: at most 0.51 ulp (measured maximum 0.5005 ulp over the sweeps of
// the tests).
func Log1p32(x float32) float32 {
	d := float64(x)
	switch {
	case math.Abs(d) < 0x1p-29:
		// log1p(x) = x*(1 - x/2 + ...) and |x/2| < 2^-30 is far below half
		// an ulp: x itself is the correctly rounded result (±0 included).
		return x
	case !(d > -1): // -1, below -1, or NaN
		if d == -1 {
			return float32(math.Inf(-1))
		}
		return float32(math.NaN())
	case d > math.MaxFloat32: // +Inf
		return x
	}
	return float32(log1p64(d))
}

// log1p64 returns log(1 + d) for finite d > -1 with a relative error below
// 2^-33.
func log1p64(d float64) float64 {
	// u = 1 + d = 2^e * m with m in [sqrt(1/2), sqrt(2)). u rounds d's
	// low bits away when d is small, but then e = 0 and d itself is used
	// below; otherwise |log(u)| >= 0.34 and u's relative rounding error of
	// 2^-53 moves it by a negligible 2^-53 absolute. u is a normal float64.
	u := 1 + d
	bits := math.Float64bits(u)
	e := int64(bits>>52) - 1023
	m := math.Float64frombits(bits&(1<<52-1) | 1023<<52) // [1, 2)
	if m > sqrt2 {
		m *= 0.5
		e++
	}
	// f = m - 1 is exact (Sterbenz). When e = 0, m = u and f = d exactly
	// up to u's rounding, so f = d is taken instead: small arguments keep
	// their full relative accuracy.
	f := m - 1
	if e == 0 {
		f = d
	}
	// log(1+f) = 2*atanh(s), s = f/(2+f), |s| <= 0.1716; the odd series
	// 2s(1 + s^2/3 + ... + s^10/11) stops with a relative error below
	// s^12/13 < 5e-11 (~2^-34).
	s := f / (2 + f)
	z := s * s
	lm := 2 * s * (1 + z*(1.0/3+z*(1.0/5+z*(1.0/7+z*(1.0/9+z*(1.0/11))))))
	return float64(e)*ln2 + lm
}

// Log1pExp32 returns log(1 + e^x) (the softplus function) rounded to
// float32, with one rounding: for x <= 0 it is the small tail of a
// Bernoulli or logistic log-likelihood, log1p(exp(-|l|)), computed without
// the intermediate float32 e^x. Log1pExp32(+Inf) = +Inf,
// Log1pExp32(-Inf) = 0, Log1pExp32(NaN) = NaN.
//
// Error: at most 0.51 ulp (measured maximum 0.5003 ulp over the sweeps of
// the tests).
func Log1pExp32(x float32) float32 {
	d := float64(x)
	if !(d >= -104) {
		if x != x {
			return x
		}
		// log(1 + e^x) < e^x < e^-104, which rounds to zero.
		return 0
	}
	if d > 104 {
		// log(1 + e^x) = x + log1p(e^-x) and e^-x < 2^-150 is far below
		// half an ulp of x.
		return x
	}
	k, r := reduce(-math.Abs(d))
	t := log1p64((1 + expm1Reduced(r)) * pow2(k)) // log1p(e^-|x|)
	if d > 0 {
		t += d
	}
	return float32(t)
}

// Tanh32 returns the hyperbolic tangent of x rounded to float32:
// tanh(x) = (e^2x - 1) / (e^2x + 1), computed from an accurate e^2|x| - 1 so
// that small arguments keep their relative accuracy. Special cases:
// Tanh32(±0) = ±0, Tanh32(±Inf) = ±1, Tanh32(NaN) = NaN.
//
// Error: at most 0.51 ulp (measured maximum 0.5001 ulp over the sweeps of
// the tests).
func Tanh32(x float32) float32 {
	d := float64(x)
	a := math.Abs(d)
	if !(a >= 0x1p-13) {
		// tanh(x) = x*(1 - x^2/3 + ...), |x^2/3| < 2^-27: x is the correctly
		// rounded result (±0 included). NaN returns itself here too.
		return x
	}
	if a > 9.5 {
		// 1 - tanh(9.5) = 2/(e^19 + 1) < 2^-26, below half an ulp of 1;
		// also covers ±Inf.
		return float32(math.Copysign(1, d))
	}
	em := expm1x64(2 * a)
	t := em / (em + 2)
	if d < 0 {
		t = -t
	}
	return float32(t)
}

// Sigmoid32 returns 1/(1 + e^-x) rounded to float32, evaluated without
// overflow for every x. Sigmoid32(+Inf) = 1, Sigmoid32(-Inf) = 0,
// Sigmoid32(NaN) = NaN.
//
// Error: at most 0.51 ulp (measured maximum 0.5001 ulp over the sweeps of
// the tests).
func Sigmoid32(x float32) float32 {
	d := float64(x)
	if !(d >= -104) {
		if x != x {
			return x
		}
		// sigmoid(x) < e^x < 2^-150.
		return 0
	}
	if d > 18 {
		// 1 - sigmoid(18) = 1.5e-8 < 2^-25, half an ulp below 1.
		return 1
	}
	k, r := reduce(-d)
	e := (1 + expm1Reduced(r)) * pow2(k) // e^-x, at most e^104
	return float32(1 / (1 + e))
}

// sqrt32 returns the correctly rounded float32 square root of x: the
// float64 root of a float32 value rounds to the same float32 as the exact
// root (53 >= 2*24 + 2 bits, so the double rounding is innocuous).
func sqrt32(x float32) float32 { return float32(math.Sqrt(float64(x))) }
