package layers

import (
	"math"
	"testing"
)

// The branch-free ReLU kernels give, value for value, what the
// definitions in dense_op.go say (x*(x >= 0) with -0 becoming +0 and a
// negative input giving -0; slope 1 exactly where nonNegative(y)), on the
// special values where a bit trick could go wrong.
func TestReLUKernelsSpecialValues(t *testing.T) {
	negZero := math.Copysign(0, -1)
	in := []float64{0, negZero, 1, -1, 0.5, -0.5, math.Inf(1), math.Inf(-1), math.NaN(), -math.NaN(),
		math.SmallestNonzeroFloat64, -math.SmallestNonzeroFloat64, 1e-40, -1e-40, math.MaxFloat64, -math.MaxFloat64}
	same := func(a, b float64) bool {
		return math.Float64bits(a) == math.Float64bits(b) || (math.IsNaN(a) && math.IsNaN(b))
	}
	for _, x := range in {
		want := x * 0 // the definition: x*(x >= 0), -0 made +0
		if x >= 0 {
			want = x + 0
		}
		y64 := []float64{x}
		activate64(ReLU, y64)
		if !same(y64[0], want) {
			t.Errorf("float64 ReLU(%v) = %v, want %v", x, y64[0], want)
		}
		x32 := float32(x)
		want32 := x32 * 0
		if x32 >= 0 {
			want32 = x32 + 0
		}
		y32 := []float32{x32}
		activate32(ReLU, y32)
		if !same(float64(y32[0]), float64(want32)) || math.Signbit(float64(y32[0])) != math.Signbit(float64(want32)) {
			t.Errorf("float32 ReLU(%v) = %v, want %v", x32, y32[0], want32)
		}
		// The gradient through an output y (taking every special value
		// as an output too), with incoming gradient 3.
		for _, y := range []float64{x} {
			slope := 0.0
			if nonNegative(y) {
				slope = 1
			}
			d := []float64{0}
			actGrad(ReLU, d, []float64{y}, []float64{3})
			if !same(d[0], 3*slope) {
				t.Errorf("float64 ReLU gradient at output %v = %v, want %v", y, d[0], 3*slope)
			}
			slope32 := float32(0)
			if nonNegative(float32(y)) {
				slope32 = 1
			}
			d32 := []float32{0}
			actGrad(ReLU, d32, []float32{float32(y)}, []float32{3})
			if !same(float64(d32[0]), float64(3*slope32)) {
				t.Errorf("float32 ReLU gradient at output %v = %v, want %v", float32(y), d32[0], 3*slope32)
			}
		}
	}
}
