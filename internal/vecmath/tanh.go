package vecmath

import "math"

// Fast float32 tanh for the activations of training graphs, with the
// structure of the Bernoulli kernels (bernoulli.go): AVX2+FMA assembly
// eight values at a time on amd64, the portable Go function below
// elsewhere and for the last len%8 values.
//
//	a = |x|, y = max(-2a, -87)
//	e^y - 1 = 2^n*p + (2^n - 1), y = n*ln2 + r, |r| <= ln2/2, with
//	    p = e^r - 1 by its Taylor series to degree 7 (truncation below
//	    2^-26 relative to p); for n = 0 this is p itself, so small
//	    arguments keep their relative accuracy
//	tanh(a) = -(e^-2a - 1)/(2 + (e^-2a - 1)), with x's sign.
//
// Error: at most fastTanhULP ulp against math.Tanh, measured by the tests
// over a dense sweep of all float32 inputs and the special values; ±0,
// ±Inf and NaN give ±0, ±1 and NaN.
const fastTanhULP = 3

// TanhSlice32 replaces every y[i] by tanh(y[i]) with the fast kernel
// (error bound above).
//
// Each value's result depends on that value alone, never on its position
// in y: with the assembly kernel, the last len%8 values also go through
// it, in a padded block of eight, because the portable function rounds
// differently (no fused multiply-add) and a score must not depend on how
// records are batched.
func TanhSlice32(y []float32) {
	if !useAsm {
		for i, v := range y {
			y[i] = tanhFast32(v)
		}
		return
	}
	n := len(y) &^ 7
	if n > 0 {
		tanhAVX2(y[:n])
	}
	if n < len(y) {
		var block [8]float32
		copy(block[:], y[n:])
		tanhAVX2(block[:])
		copy(y[n:], block[:])
	}
}

// tanhFast32 is the portable form of the kernel.
func tanhFast32(x float32) float32 {
	y := -2 * abs32(x)
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
	p = p * r * r
	p += r // e^r - 1
	s := math.Float32frombits(uint32(int32(n)+127) << 23)
	em := s*p + (s - 1)
	q := em / (2 + em)
	return math.Float32frombits(math.Float32bits(q)&^(1<<31) | math.Float32bits(x)&(1<<31))
}
