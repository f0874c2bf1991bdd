//go:build !openblas

package vae

import (
	"context"
	"math"
	"testing"

	"gonum.org/v1/gonum/blas/gonum"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/gemm"
	"lowerbound.dev/layers"
)

// In the default build every graph, and every tensor product, runs on the
// SDK's engine.
func TestEngineInUse(t *testing.T) {
	if _, ok := G.WhichBLAS().(gemm.BLAS); !ok {
		t.Errorf("gorgonia uses %T, want gemm.BLAS", G.WhichBLAS())
	}
	if _, ok := tensor.WhichBLAS().(gemm.BLAS); !ok {
		t.Errorf("tensor uses %T, want gemm.BLAS", tensor.WhichBLAS())
	}
}

// Training on the engine follows training on gonum's BLAS (the reference)
// step for step: the same float32 model, data, seed and configuration, a
// few Adam steps each, then every parameter compared. The two runs differ
// only in the order (and fusion) of the products' float32 sums, about 1e-7
// relative per product; over 6 steps with learning rate 1e-3 the parameters
// (of order 0.1) then differ by a few float32 ulps (3e-8 seen), and the
// bound checked is 1e-6. A product off by 0.1% already breaks it (tried by
// scaling the engine's full tiles by 1.001), and a wrong product moves a
// parameter by up to the learning rate per step.
func TestTrainingOnEngineMatchesGonum(t *testing.T) {
	defer G.Use(G.WhichBLAS())
	data := binarySet(t, 60, 30, 3)
	cfg := TrainConfig{Epochs: 2, BatchSize: 20, Seed: 4}
	train := func(b G.BLAS) ([]EpochInfo, []*tensor.Dense) {
		G.Use(b)
		m, err := NewMLP(MLPConfig{Input: 30, Hidden: []int{40, 40}, Latent: 5, Activation: layers.Tanh, Seed: 5})
		if err != nil {
			t.Fatal(err)
		}
		info, err := m.Train(context.Background(), data, cfg)
		if err != nil {
			t.Fatal(err)
		}
		var vals []*tensor.Dense
		for _, p := range m.Params() {
			vals = append(vals, p.Value)
		}
		return info, vals
	}
	wantInfo, want := train(gonum.Implementation{})
	gotInfo, got := train(gemm.BLAS{})
	for i := range wantInfo {
		if d := math.Abs(gotInfo[i].Loss - wantInfo[i].Loss); d > 1e-4*math.Abs(wantInfo[i].Loss) {
			t.Errorf("epoch %d: loss %v on the engine, %v on gonum", i+1, gotInfo[i].Loss, wantInfo[i].Loss)
		}
	}
	worst := 0.0
	for i := range want {
		w, g := want[i].Data().([]float32), got[i].Data().([]float32)
		for j := range w {
			d := math.Abs(float64(g[j] - w[j]))
			worst = max(worst, d)
			if d > 1e-6 {
				t.Fatalf("parameter %d element %d: %v on the engine, %v on gonum", i, j, g[j], w[j])
			}
		}
	}
	t.Logf("largest parameter difference %.3g", worst)
}
