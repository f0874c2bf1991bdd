package vae

import (
	"context"
	"math/rand/v2"
	"slices"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
)

// Each optimiser step uses the gradient of that step's batch alone. The
// reference is plain gradient descent written out here, w <- w - lr*g,
// with g from a freshly compiled graph at every step (so nothing can carry
// over between steps), fed the same noise the trainer draws.
func TestTrainStepsUseFreshGradients(t *testing.T) {
	const lr, steps = 0.1, 3
	cfg := MLPConfig{Input: 6, Hidden: []int{5}, Latent: 2, Dtype: tensor.Float64, Seed: 3}
	data := priorCheckpointData(t, 1, 6, 8)
	trained, err := NewMLP(cfg)
	if err != nil {
		t.Fatal(err)
	}
	trained.graphTrain = true // bit for bit against the graphs; train_lean_test.go compares the lean path with them
	if _, err := trained.Train(context.Background(), data, TrainConfig{Epochs: steps, BatchSize: 1, Optimizer: SGD, LearnRate: lr, Seed: 11}); err != nil {
		t.Fatal(err)
	}

	manual, err := NewMLP(cfg)
	if err != nil {
		t.Fatal(err)
	}
	noise := rand.New(rand.NewPCG(11, 0x0153)) // the trainer's noise stream for Seed 11
	for s := 0; s < steps; s++ {
		p, err := manual.build(programKey{kind: kindTrain, batch: 1, k: 1})
		if err != nil {
			t.Fatal(err)
		}
		if err := manual.fillInputs(p, data, []int{0}); err != nil {
			t.Fatal(err)
		}
		if err := layers.FillNormal(noise, p.eps); err != nil {
			t.Fatal(err)
		}
		if err := p.mask.Memset(1.0); err != nil {
			t.Fatal(err)
		}
		for _, e := range []error{setScalar(p.invCount, 1), setScalar(p.beta, 1)} {
			if e != nil {
				t.Fatal(e)
			}
		}
		if err := p.run(); err != nil {
			t.Fatal(err)
		}
		for i, n := range p.paramNodes {
			g, err := n.Grad()
			if err != nil {
				t.Fatal(err)
			}
			w := p.scope.Params()[i].Value.Data().([]float64)
			for j, gj := range g.Data().([]float64) {
				w[j] -= lr * gj
			}
		}
	}
	for i, prm := range trained.Params() {
		if !slices.Equal(prm.Value.Data().([]float64), manual.Params()[i].Value.Data().([]float64)) {
			t.Errorf("parameter %s after %d steps differs from plain gradient descent", prm.Name, steps)
		}
	}
}
