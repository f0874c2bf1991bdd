package dataparallel

import (
	"context"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats"

	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

func tinyData(t *testing.T) *dataset.Set {
	t.Helper()
	rng := rand.New(rand.NewPCG(1, 2))
	x := make([]float64, 300*6)
	for i := range x {
		if rng.Float64() < 0.3 {
			x[i] = 1
		}
	}
	s, err := dataset.New(x, 300, 6)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func tinyModel(t *testing.T) *vae.Model {
	t.Helper()
	m, err := vae.NewMLP(vae.MLPConfig{Input: 6, Hidden: []int{5}, Latent: 2, Seed: 4})
	if err != nil {
		t.Fatal(err)
	}
	return m
}

// TestOneRoundIsTheMean: one round with S = 3 leaves the element-wise mean
// (gonum floats.Add and floats.Scale) of three models trained separately
// from the same start on the three shards with the same seeds.
func TestOneRoundIsTheMean(t *testing.T) {
	data := tinyData(t)
	const s, seed = 3, 9
	m := tinyModel(t)
	if err := Run(context.Background(), m, data, Config{Shards: s, Rounds: 1, Batch: 50, Seed: seed}); err != nil {
		t.Fatal(err)
	}
	shards, err := Shard(data, s, seed)
	if err != nil {
		t.Fatal(err)
	}
	var want []float64
	for i, sh := range shards {
		ref := tinyModel(t)
		if _, err := ref.Train(context.Background(), sh, vae.TrainConfig{Epochs: 1, BatchSize: 50, Seed: seed*1_000_003 + 1*s + uint64(i)}); err != nil {
			t.Fatal(err)
		}
		w := Weights(ref)
		if want == nil {
			want = make([]float64, len(w))
		}
		floats.Add(want, w)
	}
	floats.Scale(1.0/s, want)
	got := Weights(m)
	for i := range want {
		// The model stores float32: the mean is rounded once to float32.
		if float32(want[i]) != float32(got[i]) {
			t.Fatalf("weight %d: %v, want the mean %v", i, got[i], want[i])
		}
	}
	n := 0
	for _, sh := range shards {
		n += sh.Len()
	}
	if n != data.Len() {
		t.Errorf("shards hold %d records, want %d", n, data.Len())
	}
}

func TestSetWeightsChecksLength(t *testing.T) {
	m := tinyModel(t)
	w := Weights(m)
	if err := SetWeights(m, w[:len(w)-1]); err == nil {
		t.Error("SetWeights accepted a short vector")
	}
	if err := SetWeights(m, append(w, 0)); err == nil {
		t.Error("SetWeights accepted a long vector")
	}
}
