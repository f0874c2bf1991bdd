package vae

import (
	"context"
	"errors"
	"testing"
)

// errBenchDone stops a benchmark's training run once the timed steps are
// done.
var errBenchDone = errors.New("benchmark done")

// BenchmarkTrainStep times one optimiser step of the standard MLP VAE
// (784-400-20, float32, Adam, batch 100) in steady state: the graph is built
// and the first steps have run before the timer starts, so ns/op and
// allocs/op are those of one step of a long training run (a step's share of
// the per-epoch work, shuffling ten batches, included). It drives only
// Train's public hooks: the timer starts in OnStep after the warm-up steps
// and stops in OnStep after b.N more.
func BenchmarkTrainStep(b *testing.B) {
	const (
		warm          = 3  // steps before the timer starts
		stepsPerEpoch = 10 // 1000 records in batches of 100
	)
	m, data := benchModel(b), benchData(b, 100*stepsPerEpoch)
	stop := warm + b.N - 1 // the last timed step
	stopped := false
	cfg := TrainConfig{
		Epochs: (warm+b.N)/stepsPerEpoch + 1,
		Seed:   1,
		OnStep: func(s StepInfo) {
			switch s.Step {
			case warm - 1:
				b.ResetTimer()
			case stop:
				b.StopTimer()
				stopped = true
			}
		},
		OnEpoch: func(EpochInfo) error {
			if stopped {
				return errBenchDone
			}
			return nil
		},
	}
	b.ReportAllocs()
	if _, err := m.Train(context.Background(), data, cfg); err != nil && !errors.Is(err, errBenchDone) {
		b.Fatal(err)
	}
	if !stopped {
		b.Fatal("training ended before the timed steps were done")
	}
	b.ReportMetric(float64(b.N*100)/b.Elapsed().Seconds(), "records/s")
}
