package vae

import (
	"context"
	"math/rand/v2"
	"path/filepath"
	"slices"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// priorCheckpointData returns n records of f binary features (mechanics
// only; no claim about quality rests on them).
func priorCheckpointData(t *testing.T, n, f int, seed uint64) *dataset.Set {
	t.Helper()
	rng := rand.New(rand.NewPCG(seed, 1))
	x := make([]float64, n*f)
	for i := range x {
		if rng.Float64() < 0.3 {
			x[i] = 1
		}
	}
	s, err := dataset.New(x, n, f)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// Every built-in prior saves and reloads with the model: its kind and size
// come back from the metadata, its parameters bit for bit, and the reloaded
// model scores identically.
func TestCheckpointRoundTripEveryPrior(t *testing.T) {
	const f, latent = 10, 3
	data := priorCheckpointData(t, 40, f, 3)
	makers := map[string]func(enc layers.Layer, head *layers.GaussianHead) (priors.Prior, error){
		priors.KindStandardNormal: func(layers.Layer, *layers.GaussianHead) (priors.Prior, error) {
			return priors.NewStandardNormal(latent, tensor.Float64)
		},
		priors.KindDiagonal: func(layers.Layer, *layers.GaussianHead) (priors.Prior, error) {
			return priors.NewDiagonal("prior", latent, tensor.Float64)
		},
		priors.KindMixture: func(layers.Layer, *layers.GaussianHead) (priors.Prior, error) {
			return priors.NewMixture("prior", 4, latent, priors.MixtureOptions{Dtype: tensor.Float64, Seed: 2})
		},
		priors.KindVamp: func(enc layers.Layer, head *layers.GaussianHead) (priors.Prior, error) {
			return priors.NewVamp("prior", 5, []int{f}, enc, head, priors.VampOptions{Dtype: tensor.Float64, Seed: 2})
		},
	}
	for kind, mk := range makers {
		t.Run(kind, func(t *testing.T) {
			m, err := NewMLP(MLPConfig{Input: f, Hidden: []int{6}, Latent: latent, Dtype: tensor.Float64, Seed: 4, MakePrior: mk})
			if err != nil {
				t.Fatal(err)
			}
			if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 2, BatchSize: 8, LearnRate: 0.01, Seed: 5}); err != nil {
				t.Fatal(err)
			}
			path := filepath.Join(t.TempDir(), "m.safetensors")
			if err := m.Save(path); err != nil {
				t.Fatal(err)
			}
			back, err := Load(path)
			if err != nil {
				t.Fatal(err)
			}
			spec, ok := priors.Describe(back.Prior())
			if !ok || spec.Kind != kind || spec.Dim != latent {
				t.Fatalf("reloaded prior: %+v (built-in %v), want kind %s dim %d", spec, ok, kind, latent)
			}
			want, got := m.Params(), back.Params()
			if len(want) != len(got) {
				t.Fatalf("%d parameters after reload, want %d", len(got), len(want))
			}
			for i := range want {
				if want[i].Name != got[i].Name || !slices.Equal(want[i].Value.Data().([]float64), got[i].Value.Data().([]float64)) {
					t.Errorf("parameter %s differs after reload", want[i].Name)
				}
			}
			if len(m.Prior().Params()) != len(back.Prior().Params()) {
				t.Errorf("prior has %d parameters after reload, want %d", len(back.Prior().Params()), len(m.Prior().Params()))
			}
			a, err := m.Score(context.Background(), data, ScoreOptions{K: 3, Seed: 9})
			if err != nil {
				t.Fatal(err)
			}
			b, err := back.Score(context.Background(), data, ScoreOptions{K: 3, Seed: 9})
			if err != nil {
				t.Fatal(err)
			}
			if !slices.Equal(a, b) {
				t.Errorf("scores differ after reload: %v vs %v", a[:3], b[:3])
			}
		})
	}
}
