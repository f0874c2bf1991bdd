package vecmath

import (
	"math"
	"testing"
)

// The fast Bernoulli kernels are checked against the float64 functions of
// the standard library's math package (outside this project): the
// softplus tail log1p(e^-|l|) as math.Log1p(math.Exp(-|l|)) and the
// gradient x - sigmoid(l) as x - 1/(1 + math.Exp(-l)), each within a few
// float64 ulp of exact, far below the float32 bounds checked here.

// gradRef returns x - sigmoid(l) in float64, as (x - 1) + sigmoid(-l) for
// l >= 0 so that x = 1 does not cancel to zero.
func gradRef(x, l float64) float64 {
	if l >= 0 {
		e := math.Exp(-l)
		return (x - 1) + e/(1+e)
	}
	return x - 1/(1+math.Exp(-l))
}

type rowImpl struct {
	name string
	sum  func(x, l []float32) float64
	grad func(out, x, l []float32, g float32)
}

// rowImpls lists the portable Go kernels and, where this CPU runs them, the
// assembly ones, so that both are checked on the same machine.
func rowImpls() []rowImpl {
	impls := []rowImpl{{"go", bernoulliRowSumGo, bernoulliGradRowGo}}
	if useAsm {
		impls = append(impls, rowImpl{"avx2", bernoulliRowSumAVX2, bernoulliGradRowAVX2})
	}
	return impls
}

// sweepFloats calls f with every stride-th float32 bit pattern of both
// signs (normals, subnormals, ±Inf, NaN payloads).
func sweepFloats(stride uint64, f func(v float32)) {
	for b := uint64(0); b < 1<<32; b += stride {
		f(math.Float32frombits(uint32(b)))
	}
	for _, v := range []float32{0, float32(math.Copysign(0, -1)), 1, -1, 0.5, -0.5, 87, -87, 87.5, -87.5,
		88, 104, -104, math.MaxFloat32, -math.MaxFloat32, math.SmallestNonzeroFloat32,
		float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN()),
		// ln 2 * 0.5 and the t = 1/2 switch of log1p (|l| = ln 2).
		0.34657359, 0.69314718, -0.69314718} {
		f(v)
	}
}

func sweepStride() uint64 {
	if testing.Short() {
		return 65537
	}
	return 4099
}

// TestFastSoftplusTail checks log1p(e^-|l|) through the row sum: with eight
// equal logits l > 0 and x = 1 (or l < 0 and x = 0) each term is exactly
// -log1p(e^-|l|) and the float64 sum of the eight float32 terms is exact,
// so -sum/8 is the kernel's tail.
func TestFastSoftplusTail(t *testing.T) {
	for _, im := range rowImpls() {
		t.Run(im.name, func(t *testing.T) {
			var x, l [8]float32
			var worst float64
			var worstL float32
			sweepFloats(sweepStride(), func(v float32) {
				xv := float32(0)
				if v > 0 {
					xv = 1
				}
				for i := range l {
					l[i], x[i] = v, xv
				}
				if math.IsInf(float64(v), 1) {
					return // x*l - max(l, 0) = Inf - Inf is NaN (as in exact float arithmetic)
				}
				got := -im.sum(x[:], l[:]) / 8
				a := math.Abs(float64(v))
				want := math.Log1p(math.Exp(-a))
				switch {
				case v != v:
					if got == got {
						t.Errorf("tail(NaN) = %v, want NaN", got)
					}
				case a > 87:
					if math.Abs(got-want) > 0x1p-125 {
						t.Errorf("tail(%v) = %v, want %v within 2^-125", v, got, want)
					}
				default:
					if e := ulpErr(float32(got), want); e > worst {
						worst, worstL = e, v
					}
				}
			})
			if worst > fastTailULP {
				t.Errorf("max error %.3f ulp at l = %v, bound %v", worst, worstL, fastTailULP)
			}
			t.Logf("max error %.3f ulp at l = %v", worst, worstL)
		})
	}
}

// TestFastBernoulliGrad checks g*(x - sigmoid(l)) for x in {0, 1} and
// g = 1 against the float64 formula, and the scaling by g.
func TestFastBernoulliGrad(t *testing.T) {
	for _, im := range rowImpls() {
		t.Run(im.name, func(t *testing.T) {
			var x, l, out [8]float32
			var worst float64
			var worstL float32
			sweepFloats(sweepStride(), func(v float32) {
				for i := range l {
					l[i], x[i] = v, float32(i&1)
				}
				im.grad(out[:], x[:], l[:], 1)
				for i, got := range out {
					xv := float64(x[i])
					want := gradRef(xv, float64(v))
					if v != v {
						if got == got {
							t.Fatalf("grad(x=%v, l=NaN) = %v, want NaN", xv, got)
						}
						continue
					}
					if math.Abs(float64(v)) > 87 {
						// sigmoid(-|l|) < e^-87: absolute error below 2^-125.
						if math.Abs(float64(got)-want) > 0x1p-125 {
							t.Fatalf("grad(x=%v, l=%v) = %v, want %v", xv, v, got, want)
						}
						continue
					}
					if e := ulpErr(got, want); e > worst {
						worst, worstL = e, v
					}
				}
			})
			if worst > fastSigULP {
				t.Errorf("max error %.3f ulp at l = %v, bound %v", worst, worstL, fastSigULP)
			}
			t.Logf("max error %.3f ulp at l = %v", worst, worstL)
			l = [8]float32{-3, -1, -0.25, 0, 0.25, 1, 3, 7}
			x = [8]float32{0, 1, 0.5, 1, 0, 0.3, 1, 0}
			im.grad(out[:], x[:], l[:], -2.5)
			for i := range out {
				want := -2.5 * (float64(x[i]) - 1/(1+math.Exp(-float64(l[i]))))
				if math.Abs(float64(out[i])-want) > 1e-6*math.Max(1, math.Abs(want)) {
					t.Errorf("grad(x=%v, l=%v, g=-2.5) = %v, want %v", x[i], l[i], out[i], want)
				}
			}
		})
	}
}

// TestBernoulliRowDispatch checks the exported kernels on rows whose
// lengths are not multiples of eight (assembly body plus Go tail) against
// the float64 terms x*l - max(l, 0) - log1p(e^-|l|) of package math.
func TestBernoulliRowDispatch(t *testing.T) {
	for _, n := range []int{0, 1, 7, 8, 9, 31, 784} {
		x, l, out := make([]float32, n), make([]float32, n), make([]float32, n)
		var want float64
		for i := range l {
			l[i] = float32(math.Sin(float64(i)*1.7)) * 12
			x[i] = float32(i % 3 / 2)
			lf := float64(l[i])
			want += float64(x[i])*lf - math.Max(lf, 0) - math.Log1p(math.Exp(-math.Abs(lf)))
		}
		got := BernoulliRowSum32(x, l)
		// Each term is within a few float32 ulp of its magnitude (<= 13).
		if tol := 1e-5 * float64(n+1); math.Abs(got-want) > tol {
			t.Errorf("n=%d: BernoulliRowSum32 = %v, want %v within %g", n, got, want, tol)
		}
		BernoulliGradRow32(out, x, l, 0.5)
		for i := range out {
			w := 0.5 * (float64(x[i]) - 1/(1+math.Exp(-float64(l[i]))))
			if math.Abs(float64(out[i])-w) > 1e-6 {
				t.Errorf("n=%d: BernoulliGradRow32[%d] = %v, want %v", n, i, out[i], w)
			}
		}
	}
}

func BenchmarkBernoulliRowSum32(b *testing.B) {
	x, l := make([]float32, 784), make([]float32, 784)
	for i := range l {
		l[i] = float32(math.Sin(float64(i))) * 6
		x[i] = float32(i & 1)
	}
	b.SetBytes(int64(len(l)) * 4)
	for b.Loop() {
		BernoulliRowSum32(x, l)
	}
}

func BenchmarkBernoulliGradRow32(b *testing.B) {
	x, l, out := make([]float32, 784), make([]float32, 784), make([]float32, 784)
	for i := range l {
		l[i] = float32(math.Sin(float64(i))) * 6
		x[i] = float32(i & 1)
	}
	b.SetBytes(int64(len(l)) * 4)
	for b.Loop() {
		BernoulliGradRow32(out, x, l, 0.5)
	}
}
