package vae

import (
	"context"
	"fmt"
	"slices"
	"sync"
	"testing"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// inferenceResults is everything one goroutine computes.
type inferenceResults struct {
	score1, score5 []float64
	mean, sigma    *mat.Dense
	recon, decoded *mat.Dense
	generated      *mat.Dense
	report         Report
}

func runInference(m *Model, data *dataset.Set, z *mat.Dense) (inferenceResults, error) {
	ctx := context.Background()
	var r inferenceResults
	var err error
	if r.score1, err = m.Score(ctx, data, ScoreOptions{K: 1, Seed: 5}); err != nil {
		return r, fmt.Errorf("Score(K=1): %w", err)
	}
	if r.score5, err = m.Score(ctx, data, ScoreOptions{K: 5, Seed: 5}); err != nil {
		return r, fmt.Errorf("Score(K=5): %w", err)
	}
	if r.mean, r.sigma, err = m.Encode(ctx, data); err != nil {
		return r, fmt.Errorf("Encode: %w", err)
	}
	if r.recon, err = m.Reconstruct(ctx, data); err != nil {
		return r, fmt.Errorf("Reconstruct: %w", err)
	}
	if r.decoded, err = m.Decode(ctx, z, nil); err != nil {
		return r, fmt.Errorf("Decode: %w", err)
	}
	if r.generated, err = m.Generate(ctx, 4, nil, 6); err != nil {
		return r, fmt.Errorf("Generate: %w", err)
	}
	if r.report, err = m.Evaluate(ctx, data, EvalOptions{K: 2, Seed: 5}); err != nil {
		return r, fmt.Errorf("Evaluate: %w", err)
	}
	return r, nil
}

// diff names the first result that is not identical (==) to want's.
func (r inferenceResults) diff(want inferenceResults) string {
	switch {
	case !slices.Equal(r.score1, want.score1):
		return "Score(K=1)"
	case !slices.Equal(r.score5, want.score5):
		return "Score(K=5)"
	case !mat.Equal(r.mean, want.mean) || !mat.Equal(r.sigma, want.sigma):
		return "Encode"
	case !mat.Equal(r.recon, want.recon):
		return "Reconstruct"
	case !mat.Equal(r.decoded, want.decoded):
		return "Decode"
	case !mat.Equal(r.generated, want.generated):
		return "Generate"
	case r.report.NegELBO != want.report.NegELBO || r.report.NLL != want.report.NLL || !slices.Equal(r.report.KLPerDim, want.report.KLPerDim):
		return "Evaluate"
	}
	return ""
}

// TestConcurrentInference runs every inference method from 64 goroutines
// at once on one model and wants results identical to a serial run, on
// the lean path and on the graphs. Run it with -race.
func TestConcurrentInference(t *testing.T) {
	for _, path := range []string{"lean", "graph", "lean mixture prior"} {
		t.Run(path, func(t *testing.T) {
			cfg := MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Seed: 1} // float32, the default
			if path == "lean mixture prior" {
				// Its Generate samples under the read lock.
				pr, err := priors.NewMixture("mix", 4, 3, priors.MixtureOptions{Seed: 2})
				if err != nil {
					t.Fatal(err)
				}
				cfg.Prior = pr
			}
			m, err := NewMLP(cfg)
			if err != nil {
				t.Fatal(err)
			}
			if path == "graph" {
				graphOnly(m)
			} else if m.lean == nil {
				t.Fatalf("not on the lean path: %v", m.leanWhy)
			}
			testConcurrentInference(t, m)
		})
	}
}

func testConcurrentInference(t *testing.T, m *Model) {
	data := binarySet(t, 20, 12, 1)
	z, err := m.SamplePrior(7, 3)
	if err != nil {
		t.Fatal(err)
	}
	want, err := runInference(m, data, z)
	if err != nil {
		t.Fatal(err)
	}
	const workers = 64
	var wg sync.WaitGroup
	errs := make([]string, workers)
	start := make(chan struct{})
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func(w int) {
			defer wg.Done()
			<-start
			got, err := runInference(m, data, z)
			if err != nil {
				errs[w] = err.Error()
				return
			}
			if d := got.diff(want); d != "" {
				errs[w] = d + " differs from the serial run"
			}
		}(w)
	}
	close(start)
	wg.Wait()
	for w, e := range errs {
		if e != "" {
			t.Errorf("goroutine %d: %s", w, e)
		}
	}
	// And once more serially, after the pools have filled.
	again, err := runInference(m, data, z)
	if err != nil {
		t.Fatal(err)
	}
	if d := again.diff(want); d != "" {
		t.Errorf("serial run after the concurrent ones: %s differs", d)
	}
}
