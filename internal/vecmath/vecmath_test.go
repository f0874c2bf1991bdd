package vecmath

import (
	"math"
	"testing"

	"github.com/chewxy/math32"
)

// maxULP is the error bound every kernel documents. The kernels round a
// float64 value that is within about 2^-34 (relative) of the exact result,
// so the error exceeds half an ulp by at most ~2^-10 ulp. (Measured over
// the sweeps below: at most 0.5005 ulp, for Log1p32.)
const maxULP = 0.51

// ulpErr returns the error of got against the reference want (a float64
// value of the exact function, itself within one float64 ulp, i.e. 2^-29
// float32 ulp, of exact) in units of the float32 spacing at want. Results
// outside the float32 range, and NaN, must match float32(want) exactly: the
// correctly rounded float32 overflows to ±Inf (or rounds to zero) there.
func ulpErr(got float32, want float64) float64 {
	w32 := float32(want)
	if math.IsNaN(want) || math.IsInf(float64(w32), 0) || math.IsInf(float64(got), 0) || got != got {
		if got == w32 || (got != got && w32 != w32) {
			return 0
		}
		return math.Inf(1)
	}
	var ulp float64
	if a := math.Abs(want); a < 0x1p-126 {
		ulp = 0x1p-149 // subnormal spacing
	} else {
		_, e := math.Frexp(a) // a = f * 2^e, f in [0.5, 1)
		ulp = math.Ldexp(1, e-24)
	}
	return math.Abs(float64(got)-want) / ulp
}

type kernel struct {
	name string
	f    func(float32) float32
	// ref is the float64 reference from the standard library's math
	// package (outside this project).
	ref func(float64) float64
}

var kernels = []kernel{
	{"Exp32", Exp32, math.Exp},
	{"Log1p32", Log1p32, math.Log1p},
	{"Tanh32", Tanh32, math.Tanh},
	// 1/(1 + e^-x) in float64: its relative error is a few float64 ulp,
	// far below the float32 tolerance; for x < -709 e^-x overflows and the
	// quotient is 0, which is also the float32 result there.
	{"Sigmoid32", Sigmoid32, func(x float64) float64 { return 1 / (1 + math.Exp(-x)) }},
	// log(1 + e^x) from math.Log1p and math.Exp in float64, written as
	// x + log1p(e^-x) for x > 0 (the same value, without overflow).
	{"Log1pExp32", Log1pExp32, func(x float64) float64 {
		if x > 0 {
			return x + math.Log1p(math.Exp(-x))
		}
		return math.Log1p(math.Exp(x))
	}},
}

// TestKernelsSweep compares each kernel with the float64 function of
// package math at every stride-th float32 bit pattern of both signs
// (every binade, with normals, subnormals, ±Inf and NaN payloads), and
// requires at most maxULP ulp everywhere.
func TestKernelsSweep(t *testing.T) {
	stride := uint64(4099) // ~1 million inputs, ~2000 per binade
	if testing.Short() {
		stride = 65537
	}
	for _, k := range kernels {
		t.Run(k.name, func(t *testing.T) {
			var worst float64
			var worstX float32
			n := 0
			for b := uint64(0); b < 1<<32; b += stride {
				x := math.Float32frombits(uint32(b))
				e := ulpErr(k.f(x), k.ref(float64(x)))
				n++
				if e > worst || math.IsNaN(e) {
					worst, worstX = e, x
				}
			}
			t.Logf("%s: max error %.4f ulp over %d inputs, at x = %g (%#08x)", k.name, worst, n, worstX, math.Float32bits(worstX))
			if !(worst <= maxULP) {
				t.Errorf("%s(%g) = %g, want %g: error %.4f ulp > %v", k.name, worstX, k.f(worstX), k.ref(float64(worstX)), worst, maxULP)
			}
		})
	}
}

// TestKernelsDense sweeps every float32 in the ranges the fused ops use
// most (logits and pre-activations in [-20, 20], Log1p's argument e^-|l|
// in (0, 1]) with a finer stride than TestKernelsSweep.
func TestKernelsDense(t *testing.T) {
	stride := uint32(4093) // ~270000 inputs per sign
	if testing.Short() {
		stride = 65521
	}
	for _, k := range kernels {
		lo, hi := float32(-20), float32(20)
		if k.name == "Log1p32" {
			lo, hi = -0.99, 1
		}
		var worst float64
		var worstX float32
		// Walk the bit patterns of [0, hi] and of [lo, 0).
		for _, r := range [][2]float32{{0, hi}, {0, -lo}} {
			sign := float32(1)
			if r[1] == -lo {
				sign = -1
			}
			for b := math.Float32bits(r[0]); b <= math.Float32bits(r[1]); b += stride {
				x := sign * math.Float32frombits(b)
				if e := ulpErr(k.f(x), k.ref(float64(x))); !(e <= worst) {
					worst, worstX = e, x
				}
			}
		}
		t.Logf("%s: max error %.4f ulp on [%g, %g], at x = %g", k.name, worst, lo, hi, worstX)
		if !(worst <= maxULP) {
			t.Errorf("%s(%g): error %.4f ulp > %v", k.name, worstX, worst, maxULP)
		}
	}
}

func TestSpecialValues(t *testing.T) {
	inf, nan := float32(math.Inf(1)), float32(math.NaN())
	next := func(x, toward float32) float32 { return math32.Nextafter(x, toward) }
	// Expected results are the float64 functions of package math rounded
	// to float32 (Go's conversion rounds to nearest even and overflows to
	// ±Inf), compared bit for bit, so the sign of zero counts. The
	// thresholds are where e^x crosses MaxFloat32 (ln MaxFloat32 =
	// 88.7228391...), the smallest normal (ln 2^-126 = -87.336544...), the
	// smallest subnormal (ln 2^-149 = -103.27893...) and half of it
	// (-103.97208...), to the nearest float32 and its neighbours.
	cases := map[string][]float32{
		"Exp32": {0, float32(math.Copysign(0, -1)), 0x1p-149, -0x1p-149, 1e-30, -1e-30, 1, -1,
			math.MaxFloat32, -math.MaxFloat32, inf, -inf, nan,
			88.72283, next(88.72283, inf), next(88.72283, 0), 88.7228391, 89, next(89, 0),
			-87.336544, next(-87.336544, 0), next(-87.336544, -inf),
			-103.27893, next(-103.27893, 0), -103.97208, next(-103.97208, 0), next(-103.97208, -inf), -104, -150},
		"Log1p32": {0, float32(math.Copysign(0, -1)), 0x1p-149, -0x1p-149, 1e-30, -1e-30, 0x1p-29, -0x1p-29,
			next(0x1p-29, 0), -1, next(-1, 0), -2, next(-1, -inf), 1, math.MaxFloat32, -math.MaxFloat32, inf, -inf, nan},
		"Tanh32": {0, float32(math.Copysign(0, -1)), 0x1p-149, -0x1p-149, 0x1p-13, next(0x1p-13, 0), 1e-30,
			9.5, next(9.5, inf), -9.5, 20, math.MaxFloat32, -math.MaxFloat32, inf, -inf, nan},
		"Log1pExp32": {0, float32(math.Copysign(0, -1)), 0x1p-149, -0x1p-149, 1, -1, 20, -20, 104, next(104, inf), -104,
			next(-104, 0), next(-104, -inf), -103.27893, -87.336544, math.MaxFloat32, -math.MaxFloat32, inf, -inf, nan},
		"Sigmoid32": {0, float32(math.Copysign(0, -1)), 18, next(18, inf), -18, -104, next(-104, 0), -103.27893,
			-87.336544, math.MaxFloat32, -math.MaxFloat32, inf, -inf, nan},
	}
	for _, k := range kernels {
		for _, x := range cases[k.name] {
			got, want := k.f(x), float32(k.ref(float64(x)))
			same := math.Float32bits(got) == math.Float32bits(want) || (got != got && want != want)
			if !same {
				// Away from the range edges a result one ulp off is allowed
				// when the exact value is within 0.01 ulp of a midpoint;
				// report it with its ulp error so a reader can judge.
				if e := ulpErr(got, k.ref(float64(x))); e <= maxULP && !math.IsInf(float64(want), 0) && want != 0 {
					t.Logf("%s(%g) = %g, float32 of the float64 reference %g (%.4f ulp, within the bound)", k.name, x, got, want, e)
					continue
				}
				t.Errorf("%s(%g) = %g (%#08x), want %g (%#08x)", k.name, x, got, math.Float32bits(got), want, math.Float32bits(want))
			}
		}
	}
}

var sink float32

func benchKernel(b *testing.B, f func(float32) float32, lo, hi float32) {
	xs := make([]float32, 1024)
	for i := range xs {
		xs[i] = lo + (hi-lo)*float32(i)/float32(len(xs))
	}
	b.ResetTimer()
	var s float32
	for i := 0; i < b.N; i++ {
		for _, x := range xs {
			s += f(x)
		}
	}
	sink = s
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*len(xs)), "ns/value")
}

func BenchmarkExp32(b *testing.B)       { benchKernel(b, Exp32, -20, 0) }
func BenchmarkMath32Exp(b *testing.B)   { benchKernel(b, math32.Exp, -20, 0) }
func BenchmarkLog1p32(b *testing.B)     { benchKernel(b, Log1p32, 0, 1) }
func BenchmarkMath32Log1p(b *testing.B) { benchKernel(b, math32.Log1p, 0, 1) }
func BenchmarkTanh32(b *testing.B)      { benchKernel(b, Tanh32, -5, 5) }
func BenchmarkMath32Tanh(b *testing.B)  { benchKernel(b, math32.Tanh, -5, 5) }
func BenchmarkSigmoid32(b *testing.B)   { benchKernel(b, Sigmoid32, -10, 10) }
func BenchmarkLog1pExp32(b *testing.B)  { benchKernel(b, Log1pExp32, -20, 0) }

// BenchmarkMath32Log1pExp is the float32 softplus tail as the Bernoulli op
// computed it before this package: math32.Log1p(math32.Exp(x)).
func BenchmarkMath32Log1pExp(b *testing.B) {
	benchKernel(b, func(x float32) float32 { return math32.Log1p(math32.Exp(x)) }, -20, 0)
}
