package vecmath

import (
	"math"
	"testing"
)

// TestFastTanh checks the fast tanh, assembly and portable Go, against
// math.Tanh in float64 (the standard library, outside this project) over a
// dense sweep of float32 inputs and the special values, with the bound
// fastTanhULP; ±0 must keep its sign.
func TestFastTanh(t *testing.T) {
	impls := []struct {
		name string
		f    func([]float32)
	}{{"go", func(y []float32) {
		for i, v := range y {
			y[i] = tanhFast32(v)
		}
	}}}
	if useAsm {
		impls = append(impls, struct {
			name string
			f    func([]float32)
		}{"avx2", tanhAVX2})
	}
	for _, im := range impls {
		t.Run(im.name, func(t *testing.T) {
			var worst float64
			var worstX float32
			var y [8]float32
			sweepFloats(sweepStride(), func(v float32) {
				for i := range y {
					y[i] = v
				}
				im.f(y[:])
				got := y[3]
				want := math.Tanh(float64(v))
				if v != v {
					if got == got {
						t.Errorf("tanh(NaN) = %v", got)
					}
					return
				}
				if v == 0 && math.Signbit(float64(got)) != math.Signbit(float64(v)) {
					t.Errorf("tanh(%v) = %v: sign of zero lost", v, got)
				}
				if e := ulpErr(got, want); e > worst {
					worst, worstX = e, v
				}
			})
			if worst > fastTanhULP {
				t.Errorf("max error %.3f ulp at x = %v, bound %v", worst, worstX, fastTanhULP)
			}
			t.Logf("max error %.3f ulp at x = %v", worst, worstX)
		})
	}
	// The exported function on a length that is not a multiple of 8.
	y := []float32{-3, -0.5, -1e-5, 0, 1e-5, 0.5, 3, 10, 20, 1, -1}
	x := append([]float32(nil), y...)
	TanhSlice32(y)
	for i := range y {
		if e := ulpErr(y[i], math.Tanh(float64(x[i]))); e > fastTanhULP {
			t.Errorf("TanhSlice32: tanh(%v) = %v, %.2f ulp from %v", x[i], y[i], e, math.Tanh(float64(x[i])))
		}
	}
}

func BenchmarkTanhSlice32(b *testing.B) {
	y := make([]float32, 20000)
	for i := range y {
		y[i] = float32(math.Sin(float64(i))) * 3
	}
	b.SetBytes(int64(len(y)) * 4)
	for b.Loop() {
		TanhSlice32(y) // values shrink toward 0 over the runs; cost does not depend on them
	}
}
