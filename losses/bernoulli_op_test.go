package losses

import (
	"math"
	"testing"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// ulps32 returns |got - want| in units of the float32 spacing at want.
func ulps32(got float32, want float64) float64 {
	a := math.Abs(want)
	ulp := 0x1p-149
	if a >= 0x1p-126 {
		_, e := math.Frexp(a)
		ulp = math.Ldexp(1, e-24)
	}
	return math.Abs(float64(got)-want) / ulp
}

// logitSweep returns every 4999th float32 in [-lim, lim] (both signs, zero
// and the subnormals included; about 220000 values for lim = 100).
func logitSweep(lim float32) []float32 {
	var ls []float32
	for b := uint32(0); b <= math.Float32bits(lim); b += 4999 {
		v := math.Float32frombits(b)
		ls = append(ls, v, -v)
	}
	return ls
}

// TestBernoulliKernels32 checks the float32 forward and backward kernels on
// a dense sweep of logits in [-100, 100], x in {0, 1}, against the closed
// forms evaluated in float64 with the standard library's math.Log1p and
// math.Exp:
//
//	y = x*l - max(l, 0) - log1p(exp(-|l|)),   dy/dl = x - 1/(1 + exp(-l))
//
// with dy/dl written as (x - 1) + 1/(1 + exp(l)) for l >= 0 (the same
// value; in float64 the first form cancels to 0 where the exact value is
// e^-l).
//
// Bounds: (x*l - max(l, 0)) is exact for x in {0, 1} and has the tail's
// sign opposite, so one rounding of the sum plus the tail's 0.51 ulp stays
// within 1 ulp of y. The gradient rounds the sigmoid (0.51 ulp), the sum
// with x - 1 and the product with g = 1: within 1.5 ulp.
func TestBernoulliKernels32(t *testing.T) {
	ls := logitSweep(100)
	n := len(ls)
	for _, x := range []float32{0, 1} {
		xs := make([]float32, n)
		ones := make([]float32, n)
		for i := range xs {
			xs[i], ones[i] = x, 1
		}
		y := make([]float32, n)
		dy := make([]float32, n)
		bernoulliForward32(y, xs, ls)
		bernoulliBackward32(dy, xs, ls, ones)
		var worstY, worstG float64
		for i, l := range ls {
			d := float64(l)
			wantY := float64(x)*d - math.Max(d, 0) - math.Log1p(math.Exp(-math.Abs(d)))
			wantG := float64(x) - 1/(1+math.Exp(-d))
			if d >= 0 {
				wantG = (float64(x) - 1) + 1/(1+math.Exp(d))
			}
			if e := ulps32(y[i], wantY); !(e <= 1) {
				t.Errorf("x=%v l=%g: y = %g, want %g (%.3f ulp)", x, l, y[i], wantY, e)
			} else if e > worstY {
				worstY = e
			}
			if e := ulps32(dy[i], wantG); !(e <= 1.5) {
				t.Errorf("x=%v l=%g: dy/dl = %g, want %g (%.3f ulp)", x, l, dy[i], wantG, e)
			} else if e > worstG {
				worstG = e
			}
		}
		t.Logf("x=%v: %d logits, max error %.3f ulp (value), %.3f ulp (gradient)", x, n, worstY, worstG)
	}
}

// TestBernoulliOpReusesOutput runs one graph twice with different logits:
// the op must return the same output tensor both times (no allocation per
// run) and it must hold each run's values. The reference is the closed form
// in float64 with package math, as above.
func TestBernoulliOpReusesOutput(t *testing.T) {
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		g := G.NewGraph()
		xT := tensor.New(tensor.WithShape(2, 3), tensor.Of(dt))
		lT := tensor.New(tensor.WithShape(2, 3), tensor.Of(dt))
		x := G.NewMatrix(g, dt, G.WithShape(2, 3), G.WithValue(xT), G.WithName("x"))
		l := G.NewMatrix(g, dt, G.WithShape(2, 3), G.WithValue(lT), G.WithName("l"))
		y, err := BernoulliLogProb(x, l)
		if err != nil {
			t.Fatal(err)
		}
		loss := G.Must(G.Sum(y))
		if _, err := G.Grad(loss, l); err != nil {
			t.Fatal(err)
		}
		var first *tensor.Dense
		vm := G.NewTapeMachine(g)
		xs := []float64{0, 1, 1, 0, 1, 0}
		for run, ls := range [][]float64{{-3, 2, 0.5, 7, -40, 1e-3}, {1, -1, 30, -0.25, 4, -8}} {
			for i := range xs {
				xT.SetAt(castF(dt, xs[i]), i/3, i%3)
				lT.SetAt(castF(dt, ls[i]), i/3, i%3)
			}
			if err := vm.RunAll(); err != nil {
				t.Fatal(err)
			}
			got := f64s(y.Value().Data())
			gl, err := l.Grad()
			if err != nil {
				t.Fatal(err)
			}
			grad := f64s(gl.Data())
			for i := range xs {
				want := xs[i]*ls[i] - math.Max(ls[i], 0) - math.Log1p(math.Exp(-math.Abs(ls[i])))
				wantG := xs[i] - 1/(1+math.Exp(-ls[i]))
				if math.Abs(got[i]-want) > 1e-6*math.Max(1, math.Abs(want)) {
					t.Errorf("%v run %d: y[%d] = %v, want %v", dt, run, i, got[i], want)
				}
				if math.Abs(grad[i]-wantG) > 1e-6 {
					t.Errorf("%v run %d: dy/dl[%d] = %v, want %v", dt, run, i, grad[i], wantG)
				}
			}
			if run == 0 {
				first = y.Value().(*tensor.Dense)
			} else if y.Value().(*tensor.Dense) != first {
				t.Errorf("%v: the second run returned a new output tensor", dt)
			}
			vm.Reset()
		}
		vm.Close()
	}
}

func castF(dt tensor.Dtype, v float64) any {
	if dt == tensor.Float32 {
		return float32(v)
	}
	return v
}

func f64s(v any) []float64 {
	switch d := v.(type) {
	case []float64:
		return append([]float64(nil), d...)
	case []float32:
		out := make([]float64, len(d))
		for i, x := range d {
			out[i] = float64(x)
		}
		return out
	}
	return nil
}
