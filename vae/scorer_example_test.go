package vae_test

import (
	"context"
	"fmt"
	"math"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
)

// A request handler keeps one Scorer and scores each request's records
// into a slice it reuses: no data set, no graph, no allocation per call.
func ExampleScorer() {
	m, err := vae.NewMLP(vae.MLPConfig{Input: 4, Hidden: []int{8}, Latent: 2, Likelihood: losses.Gaussian{}, Seed: 1})
	if err != nil {
		panic(err)
	}
	s, err := m.NewScorer(vae.ScorerOptions{K: 8, Seed: 1})
	if err != nil {
		panic(err)
	}
	lean, _ := s.Lean()
	scores := make([]float64, 2)
	columns := make([]float64, 2*4) // -log p(x_j|z) per feature
	records := vae.Records{
		X:    []float64{0.1, -0.3, 0.2, 0.0, 3.0, -2.5, 4.0, 1.0},
		Keys: []uint64{1001, 1002}, // record ids: the same record always gets the same noise
	}
	if err := s.Score(context.Background(), scores, records, columns); err != nil {
		panic(err)
	}
	fmt.Println("lean path:", lean)
	fmt.Println("the unusual record scores higher:", scores[1] > scores[0])
	fmt.Println("finite:", !math.IsNaN(scores[0]) && !math.IsInf(scores[1], 0))
	// Output:
	// lean path: true
	// the unusual record scores higher: true
	// finite: true
}
