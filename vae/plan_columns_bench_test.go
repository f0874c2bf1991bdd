package vae

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae/dataset"
)

// The telemetry-size columns model: 12 real columns with learned sigma, a
// categorical of 3 categories and a count (14 columns, 17 decoder outputs,
// 31 encoder inputs with the mask), conditional on 3 classes, hidden 64
// and 32, latent 4, ReLU, float32, one posterior sample. Compare:
//
//	go test -run '^$' -bench 'ScoreRecordColumns' -benchtime 20000x ./vae

const serveColumns = 14

func serveColumnsModel(b *testing.B) *Model {
	b.Helper()
	cols := make([]losses.Column, 0, serveColumns)
	for j := 0; j < 12; j++ {
		cols = append(cols, losses.Column{Kind: losses.ColumnReal, LearnSigma: true})
	}
	cols = append(cols, losses.Column{Name: "mode", Kind: losses.ColumnCategorical, Categories: 3},
		losses.Column{Name: "starts", Kind: losses.ColumnCount})
	lik, err := losses.NewColumns("lik", cols, tensor.Float32)
	if err != nil {
		b.Fatal(err)
	}
	m, err := NewMLP(MLPConfig{Input: serveColumns, Hidden: []int{64, 32}, Latent: 4, Classes: 3, Likelihood: lik, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	return m
}

// serveColumnsRecords returns n invented records (demo data for timing):
// standard normal sensors, one in ten missing, a mode and a small count.
func serveColumnsRecords(n int) ([]float64, []int) {
	rng := rand.New(rand.NewPCG(2, 2))
	x := make([]float64, n*serveColumns)
	labels := make([]int, n)
	for i := 0; i < n; i++ {
		r := x[i*serveColumns : (i+1)*serveColumns]
		for j := 0; j < 12; j++ {
			r[j] = rng.NormFloat64()
			if rng.IntN(10) == 0 {
				r[j] = math.NaN()
			}
		}
		r[12], r[13] = float64(rng.IntN(3)), float64(rng.IntN(4))
		labels[i] = i % 3
	}
	return x, labels
}

// BenchmarkScoreRecordColumns scores one record of the columns model per
// call through a Scorer, with its per-column terms.
func BenchmarkScoreRecordColumns(b *testing.B) {
	m := serveColumnsModel(b)
	x, labels := serveColumnsRecords(256)
	s, err := m.NewScorer(ScorerOptions{K: 1, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	if ok, why := s.Lean(); !ok {
		b.Fatalf("not lean: %v", why)
	}
	ctx := context.Background()
	scores, cols := make([]float64, 1), make([]float64, serveColumns)
	keys := make([]uint64, 1)
	lat := make([]time.Duration, b.N)
	rec := func(i int) Records {
		r := i % 256
		keys[0] = uint64(i)
		return Records{X: x[r*serveColumns : (r+1)*serveColumns], Labels: labels[r : r+1], Keys: keys}
	}
	for i := 0; i < 300; i++ {
		_ = s.Score(ctx, scores, rec(i), cols)
	}
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		r := rec(i)
		t0 := time.Now()
		if err := s.Score(ctx, scores, r, cols); err != nil {
			b.Fatal(err)
		}
		lat[i] = time.Since(t0)
	}
	b.StopTimer()
	reportCPU(b, cpu0, b.N)
	reportLatency(b, lat)
}

// BenchmarkScoreRecordColumnsModel is the same through Model.ScoreColumns
// on a one-record data set (the lean path, with a data set and the
// results allocated per call).
func BenchmarkScoreRecordColumnsModel(b *testing.B) {
	benchScoreColumnsModel(b, serveColumnsModel(b))
}

// BenchmarkScoreRecordColumnsGraph is Model.ScoreColumns on the graph
// path, as the model was served before the lean path ran columns.
func BenchmarkScoreRecordColumnsGraph(b *testing.B) {
	benchScoreColumnsModel(b, graphOnly(serveColumnsModel(b)))
}

func benchScoreColumnsModel(b *testing.B, m *Model) {
	x, labels := serveColumnsRecords(256)
	sets := make([]*dataset.Set, 256)
	for i := range sets {
		s, err := dataset.NewMissing(x[i*serveColumns:(i+1)*serveColumns], 1, serveColumns)
		if err == nil {
			s, err = s.WithLabels(labels[i:i+1], 3)
		}
		if err != nil {
			b.Fatal(err)
		}
		sets[i] = s
	}
	ctx := context.Background()
	lat := make([]time.Duration, b.N)
	for i := 0; i < 300; i++ {
		_, _, _ = m.ScoreColumns(ctx, sets[i%256], ScoreOptions{K: 1, Seed: 1})
	}
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		t0 := time.Now()
		if _, _, err := m.ScoreColumns(ctx, sets[i%256], ScoreOptions{K: 1, Seed: 1}); err != nil {
			b.Fatal(err)
		}
		lat[i] = time.Since(t0)
	}
	b.StopTimer()
	reportCPU(b, cpu0, b.N)
	reportLatency(b, lat)
}
