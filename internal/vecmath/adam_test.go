package vecmath

import (
	"math"
	"math/rand/v2"
	"testing"
)

func adamCase(n int, seed uint64) (w, g, m, v []float32) {
	r := rand.New(rand.NewPCG(seed, 7))
	w, g, m, v = make([]float32, n), make([]float32, n), make([]float32, n), make([]float32, n)
	for i := range w {
		w[i] = float32(r.NormFloat64())
		g[i] = float32(r.NormFloat64() * math.Pow(10, -4*r.Float64()))
		m[i] = float32(r.NormFloat64() * 0.01)
		v[i] = float32(r.Float64() * 1e-4)
	}
	return
}

var adamCoeffs = func() AdamCoeffs {
	// Kingma and Ba 2015's defaults at step t = 3, lr = 1e-3.
	b1, b2, t := 0.9, 0.999, 3.0
	return AdamCoeffs{B1: float32(b1), OB1: float32(1 - b1), B2: float32(b2), OB2: float32(1 - b2),
		LR: 1e-3, Eps: 1e-8, IC1: float32(1 / (1 - math.Pow(b1, t))), IC2: float32(1 / (1 - math.Pow(b2, t)))}
}()

// TestAdam32 checks Adam32 (assembly where the CPU runs it) bit for bit
// against the portable Go loop, and both against Kingma and Ba 2015,
// Algorithm 1, evaluated in float64 from the same float32 inputs: each new
// m, v, w within a few float32 roundings (relative 2^-21 of the step for
// w; m and v 2^-22 relative, measured against the size of their terms
// where m cancels).
func TestAdam32(t *testing.T) {
	c := adamCoeffs
	for _, n := range []int{0, 1, 7, 8, 9, 64, 1001} {
		w, g, m, v := adamCase(n, uint64(n))
		w0, m0, v0 := append([]float32(nil), w...), append([]float32(nil), m...), append([]float32(nil), v...)
		wg, mg, vg := append([]float32(nil), w...), append([]float32(nil), m...), append([]float32(nil), v...)
		prev, prevg := make([]float32, n), make([]float32, n)
		if !Adam32(w, g, m, v, prev, &c) {
			t.Fatalf("n=%d: Adam32 reports a non-finite value", n)
		}
		if chk := adamGo(wg, g, mg, vg, prevg, &c); chk != 0 {
			t.Fatalf("n=%d: adamGo check %v", n, chk)
		}
		for i := range w {
			if w[i] != wg[i] || m[i] != mg[i] || v[i] != vg[i] || prev[i] != w0[i] || prevg[i] != w0[i] {
				t.Fatalf("n=%d i=%d: Adam32 (w %v m %v v %v prev %v) differs from the Go loop (w %v m %v v %v prev %v)",
					n, i, w[i], m[i], v[i], prev[i], wg[i], mg[i], vg[i], prevg[i])
			}
			// Kingma and Ba 2015, Algorithm 1, in float64.
			gi := float64(g[i])
			mi := 0.9*float64(m0[i]) + 0.1*gi
			vi := 0.999*float64(v0[i]) + 0.001*gi*gi
			step := 1e-3 * (mi / (1 - math.Pow(0.9, 3))) / (math.Sqrt(vi/(1-math.Pow(0.999, 3))) + 1e-8)
			wi := float64(w0[i]) - step
			// m may cancel: its error is relative to its terms' sizes,
			// and the step inherits it.
			mScale := 0.9*math.Abs(float64(m0[i])) + 0.1*math.Abs(gi)
			stepScale := math.Abs(step) * mScale / math.Max(math.Abs(mi), 1e-300)
			if d := math.Abs(float64(m[i]) - mi); d > 0x1p-22*mScale {
				t.Errorf("n=%d i=%d: m = %v, want %v", n, i, m[i], mi)
			}
			if d := math.Abs(float64(v[i]) - vi); d > 0x1p-22*math.Abs(vi)+1e-30 {
				t.Errorf("n=%d i=%d: v = %v, want %v", n, i, v[i], vi)
			}
			if d := math.Abs(float64(w[i]) - wi); d > 0x1p-21*stepScale+0x1p-24*math.Abs(wi) {
				t.Errorf("n=%d i=%d: w = %v, want %v", n, i, w[i], wi)
			}
		}
	}
}

// TestAdam32NonFinite checks that a NaN or infinite gradient anywhere (in
// the assembly body or the Go tail) is reported.
func TestAdam32NonFinite(t *testing.T) {
	c := adamCoeffs
	for _, bad := range []float32{float32(math.NaN()), float32(math.Inf(1)), float32(math.Inf(-1))} {
		for _, at := range []int{0, 5, 8, 15, 16, 20} {
			w, g, m, v := adamCase(21, 1)
			g[at] = bad
			if Adam32(w, g, m, v, make([]float32, 21), &c) {
				t.Errorf("gradient %v at %d: Adam32 reports every value finite (w[%d] = %v)", bad, at, at, w[at])
			}
		}
	}
	// A finite gradient giving an infinite weight: w near MaxFloat32.
	w, g, m, v := adamCase(16, 2)
	w[3], g[3], m[3] = -math.MaxFloat32, 1, 1
	c.LR = 1e38
	if Adam32(w, g, m, v, make([]float32, 16), &c) {
		t.Errorf("overflowing weight: Adam32 reports every value finite (w[3] = %v)", w[3])
	}
}

func BenchmarkAdam32(b *testing.B) {
	c := adamCoeffs
	w, g, m, v := adamCase(784*200, 3)
	prev := make([]float32, len(w))
	b.SetBytes(int64(len(w)) * 4)
	b.Run("dispatch", func(b *testing.B) {
		for b.Loop() {
			Adam32(w, g, m, v, prev, &c)
		}
	})
	b.Run("go", func(b *testing.B) {
		for b.Loop() {
			adamGo(w, g, m, v, prev, &c)
		}
	})
}

// Moments that decay below the smallest normal float32 (a parameter whose
// gradient is zero) are stored as +0, by the assembly and the Go loop
// alike, and the weights come out as they would without the flush (the
// difference is far below a float32 ulp of w).
func TestAdam32FlushesSubnormal(t *testing.T) {
	c := adamCoeffs
	const n = 67 // eight-wide blocks and a tail
	w, g, m, v := adamCase(n, 11)
	for i := range w {
		switch i % 3 {
		case 0: // decays into the subnormal range: 0.9*1.2e-38 and 0.999*1.176e-38 < 2^-126
			g[i], m[i], v[i] = 0, 1.2e-38, 1.176e-38
		case 1: // already subnormal, or -0
			g[i], m[i], v[i] = 0, -1e-40, float32(math.Copysign(0, -1))
		}
	}
	wg, mg, vg := append([]float32(nil), w...), append([]float32(nil), m...), append([]float32(nil), v...)
	wr := append([]float32(nil), w...) // the update without the flush
	prev, prevg := make([]float32, n), make([]float32, n)
	if !Adam32(w, g, m, v, prev, &c) {
		t.Fatal("Adam32 reports a non-finite value")
	}
	adamGo(wg, g, mg, vg, prevg, &c)
	for i := range w {
		if math.Float32bits(w[i]) != math.Float32bits(wg[i]) || math.Float32bits(m[i]) != math.Float32bits(mg[i]) ||
			math.Float32bits(v[i]) != math.Float32bits(vg[i]) {
			t.Fatalf("i=%d: Adam32 (w %v m %v v %v) differs from the Go loop (w %v m %v v %v)", i, w[i], m[i], v[i], wg[i], mg[i], vg[i])
		}
		if i%3 != 2 {
			if math.Float32bits(m[i]) != 0 || math.Float32bits(v[i]) != 0 {
				t.Errorf("i=%d: m %v, v %v, want +0 for both", i, m[i], v[i])
			}
			continue
		}
		if m[i] == 0 || v[i] == 0 {
			t.Errorf("i=%d: normal moments m %v, v %v were flushed", i, m[i], v[i])
		}
	}
	// Without the flush, in float64 from the same inputs (Kingma and Ba
	// 2015, Algorithm 1): the same float32 weights.
	for i := 0; i < n; i += 3 {
		mi := 0.9 * float64(float32(1.2e-38))
		step := 1e-3 * (mi * float64(c.IC1)) / (math.Sqrt(0.999*float64(float32(1.176e-38))*float64(c.IC2)) + 1e-8)
		if want := float32(float64(wr[i]) - step); w[i] != want {
			t.Errorf("i=%d: w %v, want %v as without the flush", i, w[i], want)
		}
	}
}
