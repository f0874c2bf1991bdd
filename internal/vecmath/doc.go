// Package vecmath holds the float32 elementwise kernels under the SDK's
// fused graph operations: e^x, log(1+x), tanh and the logistic sigmoid.
//
// They replace the float32 functions of github.com/chewxy/math32, whose
// Log1p converts to float64 and back around math.Log1p and whose Exp and
// Tanh are accurate to a few ulp, by kernels that are faster in a loop and
// accurate to 0.51 ulp: each one evaluates a short polynomial in float64
// (as fast as float32 on a scalar FPU) and rounds once. The bounds are
// checked against the float64 functions of the standard library's math
// package over a dense sweep of all float32 inputs and at the special values
// (±0, subnormals, ±Inf, NaN, the overflow and underflow thresholds).
//
// The functions are pure and safe for concurrent use. The package is
// internal: the public packages (losses, layers) use it inside their ops.
package vecmath
