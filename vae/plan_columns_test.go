package vae

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"sync"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// The lean path on models whose likelihood is a *losses.Columns: it must
// give the graph path's numbers (float64 to 1e-12, float32 to 1e-5,
// relative to the larger magnitude, below 1 absolutely; see plan_test.go).
// The graph path's per-column log-probabilities are checked against gonum
// stat/distuv in losses (TestColumnsMatchGonum), its encoder input and its
// missing-entry handling against the exact PPCA marginal in
// columns_test.go; here the lean path is held to the graph path.

// leanColSchema has every column kind: real with fixed sigma, with the
// default sigma and learned; positive fixed and learned; a count; a
// binary; a categorical of three categories.
var leanColSchema = []losses.Column{
	{Name: "temp", Kind: losses.ColumnReal, Sigma: 0.5},
	{Name: "press", Kind: losses.ColumnReal, LearnSigma: true},
	{Name: "flow", Kind: losses.ColumnPositive, Sigma: 0.8},
	{Name: "rate", Kind: losses.ColumnPositive, LearnSigma: true},
	{Name: "starts", Kind: losses.ColumnCount},
	{Name: "open", Kind: losses.ColumnBinary},
	{Name: "mode", Kind: losses.ColumnCategorical, Categories: 3},
	{Name: "level", Kind: losses.ColumnReal},
}

// leanColRecords returns n invented records of leanColSchema (demo data,
// not evidence: the test compares two paths on the same input), each
// entry missing with probability missing; record 1 is missing entirely.
func leanColRecords(n int, missing float64, seed uint64) []float64 {
	rng := rand.New(rand.NewPCG(seed, 3))
	c := len(leanColSchema)
	x := make([]float64, n*c)
	for i := 0; i < n; i++ {
		mode := rng.IntN(3)
		z := rng.NormFloat64() + float64(mode)
		r := x[i*c : (i+1)*c]
		r[0] = z + 0.3*rng.NormFloat64()
		r[1] = 2*rng.NormFloat64() - z
		r[2] = math.Exp(0.5*z + 0.2*rng.NormFloat64())
		r[3] = 0.1 + 3*rng.Float64()
		r[4] = float64(rng.IntN(4) + mode)
		r[5] = float64(b2i(z > 1))
		r[6] = float64(mode)
		r[7] = rng.NormFloat64()
		for j := range r {
			if i == 1 || rng.Float64() < missing {
				r[j] = math.NaN()
			}
		}
	}
	return x
}

func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}

// leanColModel is an MLP model with the columns likelihood of
// leanColSchema, its parameters (the learned log sigmas too) perturbed.
func leanColModel(t testing.TB, dt tensor.Dtype, classes int, mixture bool) *Model {
	t.Helper()
	lik, err := losses.NewColumns("lik", leanColSchema, dt)
	if err != nil {
		t.Fatal(err)
	}
	cfg := MLPConfig{Input: len(leanColSchema), Hidden: []int{9, 7}, Latent: 3, Activation: layers.Tanh, Likelihood: lik, Classes: classes, Dtype: dt, Seed: 21}
	if mixture {
		pr, err := priors.NewMixture("mix", 3, 3, priors.MixtureOptions{Dtype: dt, Seed: 22})
		if err != nil {
			t.Fatal(err)
		}
		cfg.Prior = pr
	}
	m, err := NewMLP(cfg)
	if err != nil {
		t.Fatalf("NewMLP: %v", err)
	}
	if tt, ok := t.(*testing.T); ok {
		return perturb(tt, m, 23)
	}
	return m
}

func leanColSet(t *testing.T, m *Model, n int, seed uint64) *dataset.Set {
	t.Helper()
	s, err := dataset.NewMissing(leanColRecords(n, 0.25, seed), n, m.Features())
	if err != nil {
		t.Fatal(err)
	}
	if m.Classes() > 0 {
		s = labelled(t, s, m.Classes())
	}
	return s
}

// TestLeanColumnsEqualsGraph runs the inference methods on two copies of
// a columns model (every kind, missing entries, a record with nothing
// observed), one on the lean path and one forced onto the graphs,
// unconditional and conditional, with a closed-form and a mixture prior,
// in both dtypes: scores, evaluation, the per-column contributions of
// ScoreColumns and of the Scorer, Encode, Reconstruct, Decode, Impute,
// Generate and Interpolate must agree, and the lean copy must compile no
// inference graph.
func TestLeanColumnsEqualsGraph(t *testing.T) {
	ctx := context.Background()
	cases := []struct {
		name    string
		classes int
		mixture bool
	}{{"unconditional", 0, false}, {"conditional", 3, false}, {"mixture prior", 0, true}}
	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		for _, tc := range cases {
			t.Run(dt.String()+"/"+tc.name, func(t *testing.T) {
				lean := leanColModel(t, dt, tc.classes, tc.mixture)
				graph := graphOnly(leanColModel(t, dt, tc.classes, tc.mixture))
				if lean.lean == nil {
					t.Fatalf("the columns model is not on the lean path: %v", lean.leanWhy)
				}
				data := leanColSet(t, lean, 150, 5)
				tol := tolFor(dt)
				builds, graphs := graphBuilds(lean), graphBuilds(graph)
				n, f := data.Len(), lean.Features()
				x, labels := data.Values(), data.Labels()

				for _, opt := range []ScoreOptions{{K: 1, Seed: 11}, {K: 3, Seed: 11}, {AtPosteriorMean: true}} {
					want, err := graph.Score(ctx, data, opt)
					if err != nil {
						t.Fatal(err)
					}
					got, err := lean.Score(ctx, data, opt)
					if err != nil {
						t.Fatal(err)
					}
					checkNear(t, fmt.Sprintf("Score %+v", opt), got, want, tol)

					// Per-column contributions, from ScoreColumns and from
					// the Scorer, batch and one record at a time.
					wantS, wantC, err := graph.ScoreColumns(ctx, data, opt)
					if err != nil {
						t.Fatal(err)
					}
					checkNear(t, "ScoreColumns scores (graph) against Score", wantS, want, tol)
					gotS, gotC, err := lean.ScoreColumns(ctx, data, opt)
					if err != nil {
						t.Fatal(err)
					}
					checkNear(t, fmt.Sprintf("ScoreColumns scores %+v", opt), gotS, wantS, tol)
					checkNear(t, fmt.Sprintf("ScoreColumns contributions %+v", opt), gotC.RawMatrix().Data, wantC.RawMatrix().Data, tol)
					s := newScorer(t, lean, ScorerOptions{K: opt.K, Seed: opt.Seed, Mean: opt.AtPosteriorMean})
					sc, cols := make([]float64, n), make([]float64, n*f)
					if err := s.Score(ctx, sc, Records{X: x, Labels: labels}, cols); err != nil {
						t.Fatal(err)
					}
					checkNear(t, "Scorer scores", sc, wantS, tol)
					checkNear(t, "Scorer columns", cols, wantC.RawMatrix().Data, tol)
					for i := 0; i < 3; i++ {
						r := Records{X: x[i*f : (i+1)*f], Keys: []uint64{uint64(i)}}
						if labels != nil {
							r.Labels = labels[i : i+1]
						}
						if err := s.Score(ctx, sc[:1], r, cols[:f]); err != nil {
							t.Fatal(err)
						}
						checkNear(t, fmt.Sprintf("Scorer record %d alone", i), sc[:1], wantS[i:i+1], tol)
						checkNear(t, fmt.Sprintf("Scorer columns of record %d alone", i), cols[:f], wantC.RawRowView(i), tol)
					}
					for i := 0; i < n; i++ {
						for j := 0; j < f; j++ {
							if !data.Observed(i, j) && gotC.At(i, j) != 0 {
								t.Fatalf("record %d: missing column %d contributes %v", i, j, gotC.At(i, j))
							}
						}
					}
				}

				for _, k := range []int{1, 3} {
					want, err := graph.Evaluate(ctx, data, EvalOptions{K: k, Seed: 4})
					if err != nil {
						t.Fatal(err)
					}
					got, err := lean.Evaluate(ctx, data, EvalOptions{K: k, Seed: 4})
					if err != nil {
						t.Fatal(err)
					}
					if got.Records != want.Records || got.K != want.K || got.ActiveUnits != want.ActiveUnits ||
						(got.KLPerDim == nil) != (want.KLPerDim == nil) || math.IsNaN(got.NLL) != (k < 2) {
						t.Fatalf("Evaluate K=%d: lean %+v, graph %+v", k, got, want)
					}
					g := []float64{got.NegELBO, got.Reconstruction, got.KL}
					w := []float64{want.NegELBO, want.Reconstruction, want.KL}
					if k > 1 {
						g, w = append(g, got.NLL), append(w, want.NLL)
					}
					checkNear(t, fmt.Sprintf("Evaluate K=%d", k), g, w, tol)
					checkNear(t, "Evaluate KLPerDim", got.KLPerDim, want.KLPerDim, tol)
					checkNear(t, "Evaluate MeanVariance", got.MeanVariance, want.MeanVariance, tol)
				}

				mean, sigma, err := graph.Encode(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gm, gs, err := lean.Encode(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Encode mean", gm.RawMatrix().Data, mean.RawMatrix().Data, tol)
				checkNear(t, "Encode sigma", gs.RawMatrix().Data, sigma.RawMatrix().Data, tol)

				rec, err := graph.Reconstruct(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gr, err := lean.Reconstruct(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Reconstruct", gr.RawMatrix().Data, rec.RawMatrix().Data, tol)

				imp, err := graph.Impute(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				gi, err := lean.Impute(ctx, data)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Impute", gi.RawMatrix().Data, imp.RawMatrix().Data, tol)

				dec, err := graph.Decode(ctx, mean, labels)
				if err != nil {
					t.Fatal(err)
				}
				gd, err := lean.Decode(ctx, mean, labels)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Decode", gd.RawMatrix().Data, dec.RawMatrix().Data, tol)

				var genLabels []int
				if tc.classes > 0 {
					genLabels = []int{0, 1, 2, 0, 1}
				}
				wantGen, err := graph.Generate(ctx, 5, genLabels, 8)
				if err != nil {
					t.Fatal(err)
				}
				gotGen, err := lean.Generate(ctx, 5, genLabels, 8)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Generate", gotGen.RawMatrix().Data, wantGen.RawMatrix().Data, tol)

				wantI, err := graph.Interpolate(ctx, data, 0, 2, 4)
				if err != nil {
					t.Fatal(err)
				}
				gotI, err := lean.Interpolate(ctx, data, 0, 2, 4)
				if err != nil {
					t.Fatal(err)
				}
				checkNear(t, "Interpolate", gotI.RawMatrix().Data, wantI.RawMatrix().Data, tol)

				if b := graphBuilds(lean) - builds; b != 0 {
					t.Fatalf("the lean model compiled %d inference graphs", b)
				}
				if graphBuilds(graph) == graphs {
					t.Fatal("the graph model compiled no inference graph")
				}
			})
		}
	}
}

// TestScorerColumns checks the Scorer on a columns model: it runs lean,
// takes NaN as a missing entry, gives the graph path's ScoreColumns scores
// and per-column terms for a single record with its key, and rejects a value outside its
// column's support naming the record and column.
func TestScorerColumns(t *testing.T) {
	ctx := context.Background()
	for _, dt := range []tensor.Dtype{tensor.Float64, tensor.Float32} {
		m := leanColModel(t, dt, 2, false)
		ref := graphOnly(leanColModel(t, dt, 2, false))
		data := leanColSet(t, m, 12, 8)
		f := m.Features()
		x, labels := data.Values(), data.Labels()
		keys := []uint64{5, 1 << 33, 7, 0, 9, 10, 11, 12, 13, 14, 15, 16}
		for _, o := range []ScoreOptions{{K: 1, Seed: 3, Keys: keys}, {K: 4, Seed: 3, Keys: keys}, {AtPosteriorMean: true}} {
			want, contrib, err := ref.ScoreColumns(ctx, data, o)
			if err != nil {
				t.Fatal(err)
			}
			s := newScorer(t, m, ScorerOptions{K: o.K, Seed: o.Seed, Mean: o.AtPosteriorMean})
			for i := 0; i < data.Len(); i++ {
				r := Records{X: x[i*f : (i+1)*f], Labels: labels[i : i+1]}
				if o.Keys != nil {
					r.Keys = o.Keys[i : i+1]
				} else {
					r.Keys = []uint64{uint64(i)}
				}
				got, cols := make([]float64, 1), make([]float64, f)
				if err := s.Score(ctx, got, r, cols); err != nil {
					t.Fatalf("record %d: %v", i, err)
				}
				checkNear(t, "Scorer score", got, want[i:i+1], tolFor(dt))
				checkNear(t, "Scorer columns", cols, contrib.RawRowView(i), tolFor(dt))
			}
		}
		s := newScorer(t, m, ScorerOptions{K: 1})
		bad := slices.Clone(x[:f])
		bad[6] = 3 // category 3 of 3
		err := s.Score(ctx, make([]float64, 1), Records{X: bad, Labels: []int{0}}, nil)
		if !errors.Is(err, layers.ErrInvalidArgument) || !strings.Contains(err.Error(), `record 0, column 6 ("mode")`) {
			t.Errorf("%v: category out of range: err = %v", dt, err)
		}
		bad = slices.Clone(x[:f])
		bad[2] = math.Inf(1)
		if err := s.Score(ctx, make([]float64, 1), Records{X: bad, Labels: []int{0}}, nil); !errors.Is(err, layers.ErrInvalidArgument) {
			t.Errorf("%v: infinite value: err = %v", dt, err)
		}
	}
}

// TestScorerColumnsConcurrent scores a columns model from 64 goroutines at
// once on one Scorer: every result must equal (==) the serial one. Run it
// with -race.
func TestScorerColumnsConcurrent(t *testing.T) {
	ctx := context.Background()
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		m := leanColModel(t, dt, 2, false)
		const n = 200
		data := leanColSet(t, m, n, 9)
		f := m.Features()
		x, labels := data.Values(), data.Labels()
		opts := []ScorerOptions{{K: 1, Seed: 3}, {K: 5, Seed: 3, Workers: 2}, {Mean: true}}
		scorers := make([]*Scorer, len(opts))
		want, wantCols := make([][]float64, len(opts)), make([][]float64, len(opts))
		for i, o := range opts {
			scorers[i] = newScorer(t, m, o)
			want[i], wantCols[i] = make([]float64, n), make([]float64, n*f)
			if err := scorers[i].Score(ctx, want[i], Records{X: x, Labels: labels}, wantCols[i]); err != nil {
				t.Fatal(err)
			}
		}
		var wg sync.WaitGroup
		errs := make(chan string, 64)
		for g := 0; g < 64; g++ {
			wg.Add(1)
			go func() {
				defer wg.Done()
				i := g % len(opts)
				if g%2 == 0 {
					got, cols := make([]float64, n), make([]float64, n*f)
					if err := scorers[i].Score(ctx, got, Records{X: x, Labels: labels}, cols); err != nil || !slices.Equal(got, want[i]) || !slices.Equal(cols, wantCols[i]) {
						errs <- "batch"
					}
					return
				}
				r := g % n
				got, cols := make([]float64, 1), make([]float64, f)
				err := scorers[i].Score(ctx, got, Records{X: x[r*f : (r+1)*f], Labels: labels[r : r+1], Keys: []uint64{uint64(r)}}, cols)
				if err != nil || got[0] != want[i][r] || !slices.Equal(cols, wantCols[i][r*f:(r+1)*f]) {
					errs <- "single record"
				}
			}()
		}
		wg.Wait()
		close(errs)
		for e := range errs {
			t.Fatalf("%v: a concurrent %s score differs from the serial one", dt, e)
		}
	}
}

// TestScorerColumnsNoAllocations checks that a single-record score of a
// columns model (with a missing entry and per-column terms) allocates
// nothing once the scorer is warm; skipped under the race detector, where
// sync.Pool drops entries at random.
func TestScorerColumnsNoAllocations(t *testing.T) {
	if raceEnabled {
		t.Skip("sync.Pool drops entries under the race detector")
	}
	ctx := context.Background()
	for _, classes := range []int{0, 2} {
		m := leanColModel(t, tensor.Float32, classes, false)
		f := m.Features()
		x := leanColRecords(1, 0, 4)
		x[3] = math.NaN()
		r := Records{X: x, Keys: []uint64{9}}
		if classes > 0 {
			r.Labels = []int{1}
		}
		for _, opt := range []ScorerOptions{{K: 1}, {K: 16}, {Mean: true}} {
			s := newScorer(t, m, opt)
			scores, cols := make([]float64, 1), make([]float64, f)
			allocs := testing.AllocsPerRun(200, func() {
				if err := s.Score(ctx, scores, r, cols); err != nil {
					t.Fatal(err)
				}
			})
			if allocs != 0 {
				t.Fatalf("classes %d, %+v: %v allocations per score, want 0", classes, opt, allocs)
			}
		}
	}
}

// TestScorerColumnsAfterLoad checks that a columns model read back from a
// checkpoint runs lean and scores as the saved model does (bit for bit:
// the same parameters through the same plan).
func TestScorerColumnsAfterLoad(t *testing.T) {
	ctx := context.Background()
	m := leanColModel(t, tensor.Float32, 3, false)
	data := leanColSet(t, m, 40, 6)
	var buf bytes.Buffer
	if err := m.SaveTo(&buf); err != nil {
		t.Fatal(err)
	}
	back, err := LoadFrom(&buf)
	if err != nil {
		t.Fatal(err)
	}
	r := Records{X: data.Values(), Labels: data.Labels()}
	f := m.Features()
	want, wantCols := make([]float64, 40), make([]float64, 40*f)
	if err := newScorer(t, m, ScorerOptions{K: 2, Seed: 8}).Score(ctx, want, r, wantCols); err != nil {
		t.Fatal(err)
	}
	got, cols := make([]float64, 40), make([]float64, 40*f)
	if err := newScorer(t, back, ScorerOptions{K: 2, Seed: 8}).Score(ctx, got, r, cols); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(got, want) || !slices.Equal(cols, wantCols) {
		t.Fatal("the loaded model scores differently from the saved one")
	}
}
