package vae

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"sync"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"
	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae/dataset"
)

// gaussModel is a float64 model with a fixed-sigma Gaussian likelihood and
// the standard normal prior, whose scores the tests below rebuild from
// gonum's distributions.
func gaussModel(t *testing.T, classes int) *Model {
	t.Helper()
	return mustMLP(t, MLPConfig{Input: 6, Hidden: []int{8}, Latent: 2, Activation: layers.Tanh,
		Likelihood: losses.Gaussian{Sigma: 0.7}, Classes: classes, Dtype: tensor.Float64, Seed: 8})
}

func newScorer(t *testing.T, m *Model, opt ScorerOptions) *Scorer {
	t.Helper()
	s, err := m.NewScorer(opt)
	if err != nil {
		t.Fatal(err)
	}
	if ok, why := s.Lean(); !ok {
		t.Fatalf("scorer is not lean: %v", why)
	}
	return s
}

// reference computes the score of record x (label l) by hand: the posterior
// from Encode, the noise of rand.New(rand.NewPCG(seed, key)) drawn sample by
// sample, the decoder output from Decode, and every density from gonum's
// distuv.Normal; the importance-weighted estimate is log-mean-exp of
// log p(x|z) + log p(z) - log q(z|x) (Burda, Grosse and Salakhutdinov 2016,
// eq. 8) with gonum's floats.LogSumExp. K = 1 gives -ELBO with the
// closed-form KL of Kingma and Welling 2014, appendix B. With mean, z = mu.
// It also returns -log p(x_j|z) per feature, averaged over the samples.
func reference(t *testing.T, m *Model, x []float64, l int, seed, key uint64, k int, mean bool) (float64, []float64) {
	t.Helper()
	ctx := context.Background()
	f, d := m.Features(), m.Latent()
	set := realRows(t, x, 1, f)
	var labels []int
	if m.Classes() > 0 {
		labels = []int{l}
		set = withLabels(t, set, labels, m.Classes())
	}
	mu, sigma, err := m.Encode(ctx, set)
	if err != nil {
		t.Fatal(err)
	}
	kl := 0.0
	for j := 0; j < d; j++ {
		m, s := mu.At(0, j), sigma.At(0, j)
		kl += 0.5 * (s*s + m*m - 1 - math.Log(s*s))
	}
	rng := rand.New(rand.NewPCG(seed, key))
	if mean {
		k = 1
	}
	lw := make([]float64, k)
	cols := make([]float64, f)
	var sumLL float64
	for s := 0; s < k; s++ {
		z := mat.NewDense(1, d, nil)
		var logQ, logP float64
		for j := 0; j < d; j++ {
			v := mu.At(0, j)
			if !mean {
				v += sigma.At(0, j) * rng.NormFloat64()
			}
			z.Set(0, j, v)
			logQ += distuv.Normal{Mu: mu.At(0, j), Sigma: sigma.At(0, j)}.LogProb(v)
			logP += distuv.UnitNormal.LogProb(v)
		}
		out, err := m.Decode(ctx, z, labels)
		if err != nil {
			t.Fatal(err)
		}
		var ll float64
		for j := 0; j < f; j++ {
			v := distuv.Normal{Mu: out.At(0, j), Sigma: 0.7}.LogProb(x[j])
			ll += v
			cols[j] -= v / float64(k)
		}
		sumLL += ll
		lw[s] = ll + logP - logQ
	}
	if k >= 2 {
		return -(floats.LogSumExp(lw) - math.Log(float64(k))), cols
	}
	return kl - sumLL, cols
}

func realRows(t *testing.T, x []float64, n, f int) *dataset.Set {
	t.Helper()
	s, err := dataset.New(append([]float64(nil), x...), n, f)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// TestScorerAgainstReference checks sampled (K = 1 and K = 4) and mean
// scores and the per-feature terms against the hand computation above, for
// caller-supplied keys, on an unconditional and a conditional model.
func TestScorerAgainstReference(t *testing.T) {
	ctx := context.Background()
	for _, classes := range []int{0, 3} {
		m := gaussModel(t, classes)
		data := realSet(t, 5, 6, 9)
		x := data.Values()
		keys := []uint64{77, 3, 1 << 40, 0, 12345}
		var labels []int
		if classes > 0 {
			labels = []int{2, 0, 1, 1, 2}
		}
		for _, opt := range []ScorerOptions{{K: 1, Seed: 21}, {K: 4, Seed: 21}, {Mean: true}} {
			s := newScorer(t, m, opt)
			scores, cols := make([]float64, 5), make([]float64, 5*6)
			if err := s.Score(ctx, scores, Records{X: x, Labels: labels, Keys: keys}, cols); err != nil {
				t.Fatal(err)
			}
			for i := range scores {
				l := 0
				if labels != nil {
					l = labels[i]
				}
				want, wantCols := reference(t, m, x[i*6:(i+1)*6], l, 21, keys[i], max(opt.K, 1), opt.Mean)
				if !near(scores[i], want, 1e-12) {
					t.Fatalf("classes %d, %+v, record %d: score %.17g, reference %.17g", classes, opt, i, scores[i], want)
				}
				checkNear(t, "columns", cols[i*6:(i+1)*6], wantCols, 1e-12)
			}
		}
	}
}

// TestScorerKeys checks that a record's score depends on its key, not on
// its position or company, and that keys equal to the indices give
// Model.Score's numbers.
func TestScorerKeys(t *testing.T) {
	ctx := context.Background()
	m := gaussModel(t, 0)
	data := realSet(t, 4, 6, 3)
	x := data.Values()
	s := newScorer(t, m, ScorerOptions{K: 3, Seed: 5})
	all := make([]float64, 4)
	if err := s.Score(ctx, all, Records{X: x, Keys: []uint64{40, 41, 42, 43}}, nil); err != nil {
		t.Fatal(err)
	}
	one := make([]float64, 1)
	if err := s.Score(ctx, one, Records{X: x[2*6 : 3*6], Keys: []uint64{42}}, nil); err != nil {
		t.Fatal(err)
	}
	if one[0] != all[2] {
		t.Fatalf("record with key 42 alone scores %v, in the batch %v", one[0], all[2])
	}
	if err := s.Score(ctx, one, Records{X: x[2*6 : 3*6], Keys: []uint64{2}}, nil); err != nil {
		t.Fatal(err)
	}
	if one[0] == all[2] {
		t.Fatalf("keys 2 and 42 give the same score %v", one[0])
	}
	graph, err := m.Score(ctx, data, ScoreOptions{K: 3, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	byIndex := make([]float64, 4)
	if err := s.Score(ctx, byIndex, Records{X: x}, nil); err != nil {
		t.Fatal(err)
	}
	checkNear(t, "nil keys vs Model.Score", byIndex, graph, 1e-12)
}

// TestScorerBadInput checks that every bad input is an error naming the
// record and feature (or the label), with the right sentinel.
func TestScorerBadInput(t *testing.T) {
	ctx := context.Background()
	m32 := mustMLP(t, MLPConfig{Input: 3, Hidden: []int{4}, Latent: 2, Classes: 2, Likelihood: losses.Gaussian{}, Seed: 1})
	s := newScorer(t, m32, ScorerOptions{})
	good := []float64{0, 1, 2, 3, 4, 5}
	cases := []struct {
		name   string
		r      Records
		scores int
		want   error
		words  []string
	}{
		{"wrong length", Records{X: good[:5], Labels: []int{0, 1}}, 2, layers.ErrInvalidArgument, []string{"5 values", "3 features"}},
		{"NaN", Records{X: []float64{0, 1, 2, 3, math.NaN(), 5}, Labels: []int{0, 1}}, 2, layers.ErrInvalidArgument, []string{"record 1, feature 1", "NaN"}},
		{"Inf", Records{X: []float64{math.Inf(-1), 1, 2, 3, 4, 5}, Labels: []int{0, 1}}, 2, layers.ErrInvalidArgument, []string{"record 0, feature 0", "infinite"}},
		{"float32 overflow", Records{X: []float64{0, 1, 2, 3, 4, 1e39}, Labels: []int{0, 1}}, 2, layers.ErrInvalidArgument, []string{"record 1, feature 2", "overflows float32"}},
		{"label out of range", Records{X: good, Labels: []int{0, 2}}, 2, ErrLabel, []string{"row 1", "label 2"}},
		{"missing labels", Records{X: good}, 2, ErrLabel, []string{"labels"}},
		{"keys", Records{X: good, Labels: []int{0, 1}, Keys: []uint64{1}}, 2, layers.ErrInvalidArgument, []string{"Keys"}},
		{"scores length", Records{X: good, Labels: []int{0, 1}}, 3, layers.ErrInvalidArgument, []string{"scores"}},
	}
	for _, tc := range cases {
		err := s.Score(ctx, make([]float64, tc.scores), tc.r, nil)
		if !errors.Is(err, tc.want) {
			t.Fatalf("%s: error %v, want %v", tc.name, err, tc.want)
		}
		for _, w := range tc.words {
			if !strings.Contains(err.Error(), w) {
				t.Fatalf("%s: error %q does not name %q", tc.name, err, w)
			}
		}
	}
	plain := newScorer(t, gaussModel(t, 0), ScorerOptions{})
	if err := plain.Score(ctx, make([]float64, 1), Records{X: good, Labels: []int{0}}, nil); !errors.Is(err, ErrNotConditional) {
		t.Fatalf("labels for an unconditional model: %v, want ErrNotConditional", err)
	}
	// 1e39 is a fine float64: the float64 model takes it.
	big := make([]float64, 6)
	big[0] = 1e39
	if err := plain.Score(ctx, make([]float64, 1), Records{X: big}, nil); err != nil {
		t.Fatalf("float64 model, value 1e39: %v", err)
	}
	if _, err := m32.NewScorer(ScorerOptions{K: -1}); !errors.Is(err, layers.ErrInvalidArgument) {
		t.Fatalf("K = -1: %v", err)
	}
}

// TestScorerConcurrent scores from 64 goroutines at once, on one Scorer
// per option set shared by all: every result must be identical (==) to
// the serial one. Run it with -race.
func TestScorerConcurrent(t *testing.T) {
	ctx := context.Background()
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		m := mustMLP(t, MLPConfig{Input: 10, Hidden: []int{12}, Latent: 3, Classes: 2, Likelihood: losses.Gaussian{}, Dtype: dt, Seed: 4})
		data := realSet(t, 300, 10, 2)
		x := data.Values()
		labels := make([]int, 300)
		for i := range labels {
			labels[i] = i % 2
		}
		opts := []ScorerOptions{{K: 1, Seed: 3}, {K: 5, Seed: 3, Workers: 2}, {Mean: true}}
		scorers := make([]*Scorer, len(opts))
		want := make([][]float64, len(opts))
		for i, o := range opts {
			scorers[i] = newScorer(t, m, o)
			want[i] = make([]float64, 300)
			if err := scorers[i].Score(ctx, want[i], Records{X: x, Labels: labels}, nil); err != nil {
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
				// Some goroutines score everything, some one record.
				if g%2 == 0 {
					got := make([]float64, 300)
					if err := scorers[i].Score(ctx, got, Records{X: x, Labels: labels}, nil); err != nil || !slices.Equal(got, want[i]) {
						errs <- "batch"
					}
					return
				}
				r := g % 300
				got := make([]float64, 1)
				if err := scorers[i].Score(ctx, got, Records{X: x[r*10 : (r+1)*10], Labels: labels[r : r+1], Keys: []uint64{uint64(r)}}, nil); err != nil || got[0] != want[i][r] {
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

// TestScorerNoAllocations checks that a single-record score allocates
// nothing once the scorer is warm (the pool drops entries at random under
// the race detector, so it is skipped there).
func TestScorerNoAllocations(t *testing.T) {
	if raceEnabled {
		t.Skip("sync.Pool drops entries under the race detector")
	}
	ctx := context.Background()
	m := mustMLP(t, MLPConfig{Input: 24, Hidden: []int{64, 32}, Latent: 4, Classes: 2, Likelihood: losses.Gaussian{}, Seed: 1})
	x := realSet(t, 1, 24, 1).Values()
	for _, opt := range []ScorerOptions{{K: 1}, {K: 16}, {Mean: true}} {
		s := newScorer(t, m, opt)
		scores, cols := make([]float64, 1), make([]float64, 24)
		r := Records{X: x, Labels: []int{1}, Keys: []uint64{9}}
		allocs := testing.AllocsPerRun(200, func() {
			if err := s.Score(ctx, scores, r, cols); err != nil {
				t.Fatal(err)
			}
		})
		if allocs != 0 {
			t.Fatalf("%+v: %v allocations per score, want 0", opt, allocs)
		}
	}
}

// TestScorerGraphFallback checks that a model with a user layer the lean
// path cannot run is still scored (through the graphs), and that what the
// graphs cannot do is an ErrNotLean error.
func TestScorerGraphFallback(t *testing.T) {
	ctx := context.Background()
	head, _ := layers.NewGaussianHead("head", 5, 2, layers.Options{Dtype: tensor.Float64, Seed: 1})
	dec, _ := layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{2, 5, 4}}, layers.Options{Dtype: tensor.Float64, Seed: 2})
	inner, _ := layers.NewDense("enc", 4, 5, layers.Options{Dtype: tensor.Float64, Seed: 3})
	m, err := New(Config{InputShape: []int{4}, Encoder: userDense{inner}, Head: head, Decoder: dec, Dtype: tensor.Float64})
	if err != nil {
		t.Fatal(err)
	}
	data := binarySet(t, 6, 4, 1)
	got, err := m.ScoreRecords(ctx, Records{X: data.Values()}, ScorerOptions{K: 2, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	want, err := m.Score(ctx, data, ScoreOptions{K: 2, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(got, want) {
		t.Fatalf("fallback scores %v, Model.Score %v", got, want)
	}
	s, err := m.NewScorer(ScorerOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if err := s.Score(ctx, make([]float64, 6), Records{X: data.Values()}, make([]float64, 6*4)); !errors.Is(err, ErrNotLean) {
		t.Fatalf("per-feature terms through the graphs: %v, want ErrNotLean", err)
	}
}

// TestScorerLargeK checks the streaming log-sum-exp over more samples than
// one block of decoder rows holds (K = 150 > 64) against Model.Score.
func TestScorerLargeK(t *testing.T) {
	ctx := context.Background()
	m := gaussModel(t, 2)
	data := labelled(t, realSet(t, 3, 6, 4), 2)
	want, err := m.Score(ctx, data, ScoreOptions{K: 150, Seed: 8})
	if err != nil {
		t.Fatal(err)
	}
	got, err := m.ScoreRecords(ctx, Records{X: data.Values(), Labels: data.Labels()}, ScorerOptions{K: 150, Seed: 8})
	if err != nil {
		t.Fatal(err)
	}
	checkNear(t, "K=150", got, want, 1e-12)
}

// TestScorerCancel checks that a cancelled context stops a call.
func TestScorerCancel(t *testing.T) {
	m := gaussModel(t, 0)
	x := realSet(t, 1, 6, 1).Values()
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	s := newScorer(t, m, ScorerOptions{K: 1000})
	if err := s.Score(ctx, make([]float64, 1), Records{X: x}, nil); !errors.Is(err, context.Canceled) {
		t.Fatalf("cancelled call: %v, want context.Canceled", err)
	}
}
