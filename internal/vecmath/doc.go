// Package vecmath holds the float32 elementwise kernels under the SDK's
// fused graph operations: e^x, log(1+x), log(1+e^x), tanh and the logistic
// sigmoid.
//
// Each kernel evaluates a short polynomial in float64 (as fast as float32 on
// a scalar FPU) and rounds once to float32, so it is accurate to 0.51 ulp:
// the correctly rounded result except within about 2^-10 ulp of a rounding
// midpoint. The bounds are checked against the float64 functions of the
// standard library's math package over a dense sweep of all float32 inputs
// and at the special values (±0, subnormals, ±Inf, NaN, the overflow and
// underflow thresholds). Log1pExp32 gives the softplus tail
// log1p(exp(-|l|)) of a Bernoulli log-likelihood with one rounding instead
// of two (math32.Log1p(math32.Exp(-|l|)) rounds e^-|l| to float32 first,
// and math32.Log1p itself goes through math.Log1p).
//
// Speed: on the shared benchmark machine the kernels cost about as much per
// value as the github.com/chewxy/math32 functions they replace (a few ns;
// the machine was too loaded for finer figures, see the package's
// benchmarks). Their gain in the fused ops comes from fewer passes and
// conversions, not from a faster polynomial.
//
// For training the package also has fast float32 kernels over whole rows:
// BernoulliRowSum32 and BernoulliGradRow32 (the Bernoulli log-likelihood
// of a record and its gradient with respect to the logits), TanhSlice32,
// and Adam32 (an Adam step with its undo copy and finite check). They
// evaluate short float32 polynomials, eight values at a time in AVX2+FMA
// assembly on amd64 (chosen when the package loads, from
// golang.org/x/sys/cpu) and in portable Go elsewhere; the tests check both
// on the same machine. Their bounds, a few ulp, are stated on each and
// checked against package math over dense sweeps (Adam32 has no
// approximation: it rounds like the plain float32 loop).
//
// The functions are pure and safe for concurrent use. The package is
// internal: the public packages (losses, layers) use it inside their ops.
package vecmath
