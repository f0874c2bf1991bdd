package vecmath

import "math"

// Fast float32 kernels of the Bernoulli log-likelihood, for training.
//
// The 0.51-ulp kernels above evaluate in float64, one value at a time. The
// kernels below evaluate in float32 with short polynomials, eight values at
// a time in AVX2+FMA assembly on amd64 (kernels_amd64.s) and one at a
// time in the portable Go functions of this file elsewhere; both follow the
// same steps:
//
//	e^y, y = -|l| in [-87, 0]: y = n*ln2 + r, |r| <= ln2/2 (ln2 split in
//	    a 16-bit head and a tail), e^r by its Taylor series to degree 7
//	    (truncation below 2^-27 relative), times 2^n built in the exponent
//	    bits. Below -87, y is clamped to -87 (e^-87 = 1.6e-38).
//	log(1+t), t = e^y in (0, 1]: t = 2^k*(1+f) - 1 with k = 0, f = t for
//	    t <= 1/2 and k = 1, f = (t-1)/2 (exact) above, so f lies in
//	    [-1/4, 1/2] and is exact; log(1+f) = 2*atanh(s), s = f/(2+f),
//	    |s| <= 1/5, by its odd series to s^11 (truncation below 2^-31
//	    relative); plus k*ln2.
//	sigmoid(-|l|) = t/(1+t).
//
// Error bounds, measured by the tests against the float64 functions of
// package math over a dense sweep of all float32 inputs and at the special
// values, and checked there for both implementations:
//
//	log1p(e^-|l|) (the softplus tail): at most fastTailULP ulp for
//	    |l| <= 87 (measured maximum 2.99 ulp); below e^-87 absolute
//	    (< 2^-125) beyond.
//	sigmoid(l) as used in the gradient x - sigmoid(l): at most fastSigULP
//	    ulp of the exact gradient for x in {0, 1} (measured maximum 2.00).
//
// NaN logits give NaN results; ±Inf logits give what the exact formulas
// give in float32 arithmetic (x*l - max(l, 0) is NaN for x = 1, l = +Inf).
const (
	fastTailULP = 4
	fastSigULP  = 4
)

// Exponent-building constants of the float32 kernels.
const (
	log2e32 = float32(1.4426950408889634)
	ln2hi32 = float32(0.693145751953125) // ln 2 to 16 bits: n*ln2hi is exact
	ln2lo32 = float32(1.4286068203094173e-06)
	shift32 = float32(0x1.8p23) // adding it rounds |v| < 2^22 to an integer
	minArg  = float32(-87)
)

// BernoulliRowSum32 returns the float64 sum over i of the Bernoulli
// log-likelihood terms x[i]*l[i] - softplus(l[i]), softplus(l) = max(l, 0)
// + log1p(e^-|l|), with the fast kernels (error bound above; the sum is
// accumulated in float64). x must be at least as long as l.
func BernoulliRowSum32(x, l []float32) float64 {
	x = x[:len(l)]
	var acc float64
	n := 0
	if useAsm {
		n = len(l) &^ 7
		if n > 0 {
			acc = bernoulliRowSumAVX2(x[:n], l[:n])
		}
	}
	return acc + bernoulliRowSumGo(x[n:], l[n:])
}

// BernoulliGradRow32 sets out[i] = g*(x[i] - sigmoid(l[i])), the gradient
// of BernoulliRowSum32's terms with respect to the logits times g, with the
// fast kernels (error bound above). x and out must be at least as long as
// l.
func BernoulliGradRow32(out, x, l []float32, g float32) {
	x, out = x[:len(l)], out[:len(l)]
	n := 0
	if useAsm {
		n = len(l) &^ 7
		if n > 0 {
			bernoulliGradRowAVX2(out[:n], x[:n], l[:n], g)
		}
	}
	bernoulliGradRowGo(out[n:], x[n:], l[n:], g)
}

// expNeg32 returns e^y for y <= 0 or NaN (y below minArg is taken as
// minArg).
func expNeg32(y float32) float32 {
	if y < minArg {
		y = minArg
	}
	t := y*log2e32 + shift32
	n := t - shift32
	r := y - n*ln2hi32
	r -= n * ln2lo32
	p := float32(1.0 / 5040)
	p = p*r + 1.0/720
	p = p*r + 1.0/120
	p = p*r + 1.0/24
	p = p*r + 1.0/6
	p = p*r + 0.5
	p = p*r + 1
	p = p*r + 1
	return p * math.Float32frombits(uint32(int32(n)+127)<<23)
}

// log1pUnit32 returns log(1 + t) for t in [0, 1] or NaN.
func log1pUnit32(t float32) float32 {
	f, hi, lo := t, float32(0), float32(0)
	if t > 0.5 {
		f, hi, lo = (t-1)*0.5, ln2hi32, ln2lo32
	}
	s := f / (2 + f)
	z := s * s
	q := float32(2.0 / 11)
	q = q*z + 2.0/9
	q = q*z + 2.0/7
	q = q*z + 2.0/5
	q = q*z + 2.0/3
	q = q*z + 2
	return (s*q + lo) + hi
}

// softplusTail32 returns log1p(e^-|l|).
func softplusTail32(l float32) float32 {
	return log1pUnit32(expNeg32(-abs32(l)))
}

func abs32(v float32) float32 { return math.Float32frombits(math.Float32bits(v) &^ (1 << 31)) }

func bernoulliRowSumGo(x, l []float32) float64 {
	x = x[:len(l)]
	var acc float64
	for i, li := range l {
		relu := li
		if li < 0 {
			relu = 0
		}
		acc += float64((x[i]*li - relu) - softplusTail32(li))
	}
	return acc
}

func bernoulliGradRowGo(out, x, l []float32, g float32) {
	x, out = x[:len(l)], out[:len(l)]
	for i, li := range l {
		t := expNeg32(-abs32(li))
		s := t / (1 + t) // sigmoid(-|l|)
		var d float32
		if math.Float32bits(li)>>31 == 0 {
			d = (x[i] - 1) + s
		} else {
			d = x[i] - s
		}
		out[i] = g * d
	}
}

// BernoulliRowSum64 is BernoulliRowSum32 in float64 with package math:
// the sum over i of x[i]*l[i] - (max(l[i], 0) + log1p(e^-|l[i]|)).
func BernoulliRowSum64(x, l []float64) float64 {
	x = x[:len(l)]
	var acc float64
	for i, li := range l {
		acc += (x[i]*li - math.Max(li, 0)) - math.Log1p(math.Exp(-math.Abs(li)))
	}
	return acc
}

// BernoulliGradRow64 is BernoulliGradRow32 in float64 with package math:
// out[i] = g*BernoulliDiff64(x[i], l[i]).
func BernoulliGradRow64(out, x, l []float64, g float64) {
	x, out = x[:len(l)], out[:len(l)]
	for i, li := range l {
		out[i] = g * BernoulliDiff64(x[i], li)
	}
}

// BernoulliDiff64 returns x - sigmoid(l), the derivative of x*l -
// softplus(l) with respect to l, written as (x - 1) + sigmoid(-l) for
// l >= 0 and as x - sigmoid(l) otherwise: the sigmoid is then always of
// -|l|, at most 1/2, and the form keeps precision where sigmoid(l) is
// close to 1.
func BernoulliDiff64(x, l float64) float64 {
	if l >= 0 {
		e := math.Exp(-l)
		return (x - 1) + e/(1+e)
	}
	e := math.Exp(l)
	return x - e/(1+e)
}
