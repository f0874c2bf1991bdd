package vae_test

import (
	"context"
	"fmt"
	"log"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"

	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// twoPatterns returns n records of 16 binary features: half of them have
// the first 8 features on, half the last 8, each feature flipped with
// probability 0.05.
func twoPatterns(n int, seed uint64) *dataset.Set {
	rng := rand.New(rand.NewPCG(seed, 1))
	rows := make([][]float64, n)
	for i := range rows {
		rows[i] = make([]float64, 16)
		for j := range rows[i] {
			on := (j < 8) == (i%2 == 0)
			if rng.Float64() < 0.05 {
				on = !on
			}
			if on {
				rows[i][j] = 1
			}
		}
	}
	data, err := dataset.FromRows(rows)
	if err != nil {
		log.Fatal(err)
	}
	return data
}

// Build the fully connected model, train it and evaluate it.
func ExampleNewMLP() {
	ctx := context.Background()
	data := twoPatterns(200, 1)
	m, err := vae.NewMLP(vae.MLPConfig{Input: 16, Hidden: []int{32}, Latent: 2, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	hist, err := m.Train(ctx, data, vae.TrainConfig{Epochs: 10, BatchSize: 20, LearnRate: 0.01, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	rep, err := m.Evaluate(ctx, data, vae.EvalOptions{K: 10, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	fmt.Println("epochs:", len(hist))
	fmt.Println("records:", rep.Records, "latent:", m.Latent(), "features:", m.Features())
	fmt.Println("loss went down:", hist[len(hist)-1].Loss < hist[0].Loss)
	fmt.Println("KL per dimension reported:", len(rep.KLPerDim))
	// Output:
	// epochs: 10
	// records: 200 latent: 2 features: 16
	// loss went down: true
	// KL per dimension reported: 2
}

// Save a model to a safetensors file and load it back.
func ExampleModel_Save() {
	ctx := context.Background()
	data := twoPatterns(40, 2)
	m, err := vae.NewMLP(vae.MLPConfig{Input: 16, Hidden: []int{8}, Latent: 2, Seed: 3})
	if err != nil {
		log.Fatal(err)
	}
	if err := m.SetExtra("trained-on", "two patterns"); err != nil {
		log.Fatal(err)
	}
	dir, err := os.MkdirTemp("", "vae-example-")
	if err != nil {
		log.Fatal(err)
	}
	defer os.RemoveAll(dir)
	path := filepath.Join(dir, "model.safetensors")
	if err := m.Save(path); err != nil {
		log.Fatal(err)
	}
	loaded, err := vae.Load(path)
	if err != nil {
		log.Fatal(err)
	}
	a, err := m.Score(ctx, data, vae.ScoreOptions{K: 5, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	b, err := loaded.Score(ctx, data, vae.ScoreOptions{K: 5, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	fmt.Println("parameters:", len(loaded.Params()))
	fmt.Println("same scores:", slices.Equal(a, b))
	fmt.Println("metadata:", loaded.Extra()["trained-on"])
	// Output:
	// parameters: 10
	// same scores: true
	// metadata: two patterns
}

// Score records for anomaly detection: a record unlike the training data
// gets a higher score (a higher estimate of -log p(x)).
func ExampleModel_Score() {
	ctx := context.Background()
	m, err := vae.NewMLP(vae.MLPConfig{Input: 16, Hidden: []int{32}, Latent: 2, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	if _, err := m.Train(ctx, twoPatterns(200, 1), vae.TrainConfig{Epochs: 10, BatchSize: 20, LearnRate: 0.01, Seed: 1}); err != nil {
		log.Fatal(err)
	}
	odd := make([]float64, 16)
	for j := range odd {
		odd[j] = float64(j % 2) // alternating, unlike either pattern
	}
	usual := twoPatterns(2, 9)
	queries, err := dataset.FromRows([][]float64{usual.Row(0), usual.Row(1), odd})
	if err != nil {
		log.Fatal(err)
	}
	scores, err := m.Score(ctx, queries, vae.ScoreOptions{K: 20, Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	fmt.Println("scores:", len(scores))
	fmt.Println("the odd record scores highest:", scores[2] > scores[0] && scores[2] > scores[1])
	// Output:
	// scores: 3
	// the odd record scores highest: true
}
