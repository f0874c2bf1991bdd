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

// A value's tanh must not depend on where it stands in the slice (a
// record's score must not depend on how records are batched): the same
// value at every offset of slices of every length up to 17 gives the same
// bits. Common practice for vector kernels with a scalar tail, which
// otherwise rounds differently.
func TestTanhSlice32PositionIndependent(t *testing.T) {
	// The values where the portable function and the assembly disagree
	// are the ones that show a dependence on position: a sweep of 4001
	// values over [-10, 10] holds some (seen when this test was written).
	var values []float32
	for i := 0; i <= 4000; i++ {
		values = append(values, float32(i-2000)/200+1e-3)
	}
	for _, v := range values {
		var want float32
		for _, n := range []int{1, 3, 8, 9, 17} {
			for at := 0; at < n; at++ {
				y := make([]float32, n)
				for i := range y {
					y[i] = 0.1 * float32(i)
				}
				y[at] = v
				TanhSlice32(y)
				if n == 1 {
					want = y[at]
				}
				if math.Float32bits(y[at]) != math.Float32bits(want) {
					t.Fatalf("tanh(%v) at %d of %d = %v, alone %v", v, at, n, y[at], want)
				}
			}
		}
	}
}
