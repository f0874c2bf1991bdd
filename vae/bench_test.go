package vae

import (
	"context"
	"math/rand/v2"
	"testing"

	"lowerbound.dev/vae/dataset"
)

// benchData returns n records of 784 binary values at about MNIST's ink
// density; the benchmarks measure speed only, so the pixels are random.
func benchData(b *testing.B, n int) *dataset.Set {
	b.Helper()
	rng := rand.New(rand.NewPCG(1, 1))
	x := make([]float64, n*784)
	for i := range x {
		if rng.Float64() < 0.13 {
			x[i] = 1
		}
	}
	s, err := dataset.New(x, n, 784)
	if err != nil {
		b.Fatal(err)
	}
	return s
}

func benchModel(b *testing.B) *Model {
	b.Helper()
	m, err := NewMLP(MLPConfig{Input: 784, Hidden: []int{400}, Latent: 20, Seed: 1})
	if err != nil {
		b.Fatal(err)
	}
	return m
}

// BenchmarkTrainEpoch1000 trains the standard MLP VAE (784-400-20, float32,
// Adam, batch 100) for one epoch of 1000 records: ten optimiser steps per
// iteration, including the one graph build of each Train call. Compare
// builds with benchstat; the MNIST command
// (internal/cmd/mnistbench) measures whole epochs against the PyTorch
// reference.
func BenchmarkTrainEpoch1000(b *testing.B) {
	m, data := benchModel(b), benchData(b, 1000)
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		if _, err := m.Train(context.Background(), data, TrainConfig{Epochs: 1, Seed: uint64(i)}); err != nil {
			b.Fatal(err)
		}
	}
	reportCPU(b, cpu0, b.N*data.Len())
	b.ReportMetric(float64(b.N*data.Len())/b.Elapsed().Seconds(), "records/s")
}

// BenchmarkScoreParallel scores 128-record batches with K = 16 importance
// samples from all GOMAXPROCS goroutines at once, as a service would.
func BenchmarkScoreParallel(b *testing.B) { benchScoreParallel(b, benchModel(b)) }

// BenchmarkScoreParallelGraph is the same with the model forced onto the
// graph path.
func BenchmarkScoreParallelGraph(b *testing.B) { benchScoreParallel(b, graphOnly(benchModel(b))) }

func benchScoreParallel(b *testing.B, m *Model) {
	data := benchData(b, 128)
	if _, err := m.Score(context.Background(), data, ScoreOptions{K: 16}); err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	b.ResetTimer()
	cpu0 := cpuTime()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			if _, err := m.Score(context.Background(), data, ScoreOptions{K: 16, Seed: 3}); err != nil {
				b.Error(err)
				return
			}
		}
	})
	reportCPU(b, cpu0, b.N*data.Len())
	b.ReportMetric(float64(b.N*data.Len())/b.Elapsed().Seconds(), "records/s")
}
