package vae

import (
	"context"
	"testing"

	"lowerbound.dev/internal/mnist"
)

// TestMNISTQuality trains the standard MLP model (784-400-20, Bernoulli
// likelihood, standard normal prior, float32) for one epoch on the first
// 10000 binarised MNIST training images (Adam 1e-3, batches of 100, so 100
// steps) and checks the negative ELBO on the first 2000 test images.
//
// The bound comes from the PyTorch reference in ../shared/bench (same
// model, optimiser, batch size and binarisation), which reports 112.7 nats
// after one full epoch of 60000 images. Run on the same reduced data
// (first 10000 training images, one epoch, first 2000 test images; a copy
// of the script with only those slices changed), it reached 175.6 to
// 177.7 nats over seeds 0 to 3. The bound, 180 nats, asks this SDK to do
// at least as well as the reference with a margin of about 1%; it is loose
// because 100 steps leave both far from convergence; the untrained model
// scores about 650 nats (logged), so a broken objective, gradient or
// optimiser fails it. MNIST is LeCun et al.'s open dataset, fetched through the Go
// module proxy by internal/mnist.
func TestMNISTQuality(t *testing.T) {
	if testing.Short() {
		t.Skip("trains on MNIST")
	}
	ctx := context.Background()
	if _, err := mnist.Dir(ctx); err != nil {
		t.Skipf("MNIST not available: %v", err)
	}
	train, test, err := mnist.Load(ctx, mnist.Options{Binarize: true, Limit: 10000})
	if err != nil {
		t.Fatalf("mnist.Load: %v", err)
	}
	idx := make([]int, 2000)
	for i := range idx {
		idx[i] = i
	}
	if test, err = test.Subset(idx); err != nil {
		t.Fatal(err)
	}
	if train.Len() != 10000 || test.Len() != 2000 || train.Features() != 784 {
		t.Fatalf("data: %d training and %d test records of %d features", train.Len(), test.Len(), train.Features())
	}
	m, err := NewMLP(MLPConfig{Input: 784, Hidden: []int{400}, Latent: 20, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	before, err := m.Evaluate(ctx, test, EvalOptions{K: 1, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	hist, err := m.Train(ctx, train, TrainConfig{Epochs: 1, BatchSize: 100, LearnRate: 1e-3, Seed: 1})
	if err != nil {
		t.Fatalf("Train: %v", err)
	}
	rep, err := m.Evaluate(ctx, test, EvalOptions{K: 1, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("test negative ELBO %.2f nats (reconstruction %.2f, KL %.2f, %d active units); before training %.2f; training loss %.2f",
		rep.NegELBO, rep.Reconstruction, rep.KL, rep.ActiveUnits, before.NegELBO, hist[0].Loss)
	if rep.NegELBO >= 180 {
		t.Errorf("test negative ELBO %.2f nats, want < 180 (the PyTorch reference reaches 175.6-177.7 here)", rep.NegELBO)
	}
}
