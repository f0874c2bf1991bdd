package vae

import (
	"math"
	"math/rand/v2"
	"testing"

	"gorgonia.org/tensor"
)

// TestAdamFloat32Kernel runs the trainer's float32 Adam (vecmath.Adam32,
// vectorised on amd64) and the generic float32 loop adamUpdate side by side
// for a few steps on sizes that are and are not multiples of the vector
// width. They perform the same IEEE float32 operations in the same order,
// so they agree to float32 rounding: each of the eight operations rounds
// once, sqrt and division correctly in both, and any difference (a
// compiler fusing a multiply-add) is at most an ulp or two per operation,
// hence the tolerance of 2^-19 of the step plus 2^-23 of the weight. The
// generic loop itself is checked against gorgonia's AdamSolver by
// TestAdamMatchesGorgonia.
func TestAdamFloat32Kernel(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	sizes := []int{221, 8, 3, 64}
	var params, grads []*tensor.Dense
	ref := make([][]float32, len(sizes))
	for i, n := range sizes {
		w := make([]float32, n)
		for j := range w {
			w[j] = float32(rng.NormFloat64())
		}
		ref[i] = append([]float32(nil), w...)
		params = append(params, tensor.New(tensor.WithShape(n), tensor.WithBacking(w)))
		grads = append(grads, tensor.New(tensor.WithShape(n), tensor.Of(tensor.Float32)))
	}
	ours := &adam{lr: 1e-3, beta1: 0.9, beta2: 0.999, eps: 1e-8}
	theirs := &adam{lr: 1e-3, beta1: 0.9, beta2: 0.999, eps: 1e-8}
	rm, rv, rp := make([][]float32, len(sizes)), make([][]float32, len(sizes)), make([][]float32, len(sizes))
	for i, n := range sizes {
		rm[i], rv[i], rp[i] = make([]float32, n), make([]float32, n), make([]float32, n)
	}
	for step := 1; step <= 7; step++ {
		for i := range grads {
			g := grads[i].Data().([]float32)
			for j := range g {
				g[j] = float32(rng.NormFloat64() * math.Pow(10, float64(j%4-2)))
			}
		}
		if bad, err := ours.step(params, grads); err != nil || bad >= 0 {
			t.Fatalf("step %d: parameter %d not finite, error %v", step, bad, err)
		}
		theirs.t = step
		c1 := 1 - math.Pow(0.9, float64(step))
		c2 := 1 - math.Pow(0.999, float64(step))
		for i := range sizes {
			before := append([]float32(nil), ref[i]...)
			if !adamUpdate(ref[i], grads[i].Data().([]float32), rm[i], rv[i], rp[i], theirs, c1, c2) {
				t.Fatalf("step %d: reference update not finite", step)
			}
			got := params[i].Data().([]float32)
			for j := range got {
				stepSize := math.Abs(float64(ref[i][j]) - float64(before[j]))
				tol := 0x1p-19*stepSize + 0x1p-23*math.Abs(float64(ref[i][j]))
				if d := math.Abs(float64(got[j]) - float64(ref[i][j])); d > tol {
					t.Fatalf("step %d, parameter %d[%d]: %v, reference loop %v (tolerance %g)", step, i, j, got[j], ref[i][j], tol)
				}
			}
		}
	}
}
