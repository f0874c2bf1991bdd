package vae

import (
	"context"
	"slices"
	"syscall"
	"testing"
	"time"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae/dataset"
)

// The serving benchmarks use the telemetry-size model of the PyTorch
// reference ../shared/bench/torch-serve: 24 features, hidden 64 and 32,
// latent 4, ReLU, Gaussian likelihood with unit sigma, float32, one
// posterior sample (the negative ELBO). Compare them in one run:
//
//	go test -run '^$' -bench 'ScoreRecord|ScoreBatch' -benchtime 20000x ./vae
//
// The ...Model benchmarks run Model.Score (the lean path, from a data
// set); the ...Graph ones force the same model onto the graphs.
//	../shared/bench/torch-serve 1

func serveModel(b *testing.B) *Model {
	b.Helper()
	m, err := NewMLP(MLPConfig{Input: 24, Hidden: []int{64, 32}, Latent: 4, Likelihood: losses.Gaussian{Sigma: 1}, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	return m
}

func serveRecords(b *testing.B, n int) []float64 {
	b.Helper()
	return realSet(b, n, 24, 2).Values()
}

// reportLatency adds the median and 99th percentile of the per-call
// latencies as custom metrics.
func reportLatency(b *testing.B, lat []time.Duration) {
	if len(lat) == 0 {
		return
	}
	slices.Sort(lat)
	b.ReportMetric(float64(lat[len(lat)/2].Nanoseconds())/1e3, "p50-us")
	b.ReportMetric(float64(lat[len(lat)*99/100].Nanoseconds())/1e3, "p99-us")
}

// cpuTime returns the CPU time (user and system) the process has used: on
// a shared machine, work per CPU second is steadier than work per second.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// reportCPU adds the CPU time per record since start.
func reportCPU(b *testing.B, start time.Duration, records int) {
	if used := cpuTime() - start; used > 0 {
		b.ReportMetric(float64(used.Nanoseconds())/1e3/float64(records), "cpu-us/record")
	}
}

// BenchmarkScoreRecord scores one record per call through a Scorer, the
// way a request handler does, into a caller-provided slice.
func BenchmarkScoreRecord(b *testing.B) {
	m := serveModel(b)
	x := serveRecords(b, 256)
	s, err := m.NewScorer(ScorerOptions{K: 1, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	scores := make([]float64, 1)
	keys := make([]uint64, 1)
	lat := make([]time.Duration, b.N)
	for i := 0; i < 300; i++ {
		_ = s.Score(ctx, scores, Records{X: x[(i%256)*24 : (i%256+1)*24]}, nil)
	}
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		r := i % 256
		keys[0] = uint64(i)
		t0 := time.Now()
		if err := s.Score(ctx, scores, Records{X: x[r*24 : (r+1)*24], Keys: keys}, nil); err != nil {
			b.Fatal(err)
		}
		lat[i] = time.Since(t0)
	}
	b.StopTimer()
	reportCPU(b, cpu0, b.N)
	reportLatency(b, lat)
}

// BenchmarkScoreRecordModel is the same through Model.Score on a
// one-record data set (the lean path, with a data set and a result slice
// per call).
func BenchmarkScoreRecordModel(b *testing.B) { benchScoreRecordModel(b, serveModel(b)) }

// BenchmarkScoreRecordGraph is the same through the graph path, for
// comparison.
func BenchmarkScoreRecordGraph(b *testing.B) { benchScoreRecordModel(b, graphOnly(serveModel(b))) }

func benchScoreRecordModel(b *testing.B, m *Model) {
	x := serveRecords(b, 256)
	sets := make([]*dataset.Set, 256)
	for i := range sets {
		var err error
		if sets[i], err = dataset.New(x[i*24:(i+1)*24], 1, 24); err != nil {
			b.Fatal(err)
		}
	}
	ctx := context.Background()
	lat := make([]time.Duration, b.N)
	for i := 0; i < 300; i++ {
		_, _ = m.Score(ctx, sets[i%256], ScoreOptions{K: 1, Seed: 1})
	}
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		t0 := time.Now()
		if _, err := m.Score(ctx, sets[i%256], ScoreOptions{K: 1, Seed: 1}); err != nil {
			b.Fatal(err)
		}
		lat[i] = time.Since(t0)
	}
	b.StopTimer()
	reportCPU(b, cpu0, b.N)
	reportLatency(b, lat)
}

// BenchmarkScoreBatch scores 100,000 records in one call on all
// GOMAXPROCS cores.
func BenchmarkScoreBatch(b *testing.B) {
	m := serveModel(b)
	const n = 100000
	x := serveRecords(b, n)
	s, err := m.NewScorer(ScorerOptions{K: 1, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	scores := make([]float64, n)
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		if err := s.Score(ctx, scores, Records{X: x}, nil); err != nil {
			b.Fatal(err)
		}
	}
	reportCPU(b, cpu0, b.N*n)
	b.ReportMetric(float64(b.N*n)/b.Elapsed().Seconds(), "records/s")
}

// BenchmarkScoreBatchModel is the same through Model.Score (the lean
// path).
func BenchmarkScoreBatchModel(b *testing.B) { benchScoreBatchModel(b, serveModel(b)) }

// BenchmarkScoreBatchGraph is the same through the graph path.
func BenchmarkScoreBatchGraph(b *testing.B) { benchScoreBatchModel(b, graphOnly(serveModel(b))) }

func benchScoreBatchModel(b *testing.B, m *Model) {
	const n = 100000
	data, err := dataset.New(serveRecords(b, n), n, 24)
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		if _, err := m.Score(ctx, data, ScoreOptions{K: 1, Seed: 1}); err != nil {
			b.Fatal(err)
		}
	}
	reportCPU(b, cpu0, b.N*n)
	b.ReportMetric(float64(b.N*n)/b.Elapsed().Seconds(), "records/s")
}

// BenchmarkScoreChunk scores 4096 records on one goroutine: the per-record
// cost of the lean path without parallelism.
func BenchmarkScoreChunk(b *testing.B) {
	m := serveModel(b)
	const n = 4096
	x := serveRecords(b, n)
	s, err := m.NewScorer(ScorerOptions{K: 1, Seed: 1, Workers: 1})
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	scores := make([]float64, n)
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		if err := s.Score(ctx, scores, Records{X: x}, nil); err != nil {
			b.Fatal(err)
		}
	}
	reportCPU(b, cpu0, b.N*n)
	b.ReportMetric(float64(b.N*n)/b.Elapsed().Seconds(), "records/s")
}
