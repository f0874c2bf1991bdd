// Package progress reports the progress of vae.Model.Train for the example
// programs: a progress bar when the output is a terminal, one plain log line
// per epoch otherwise (a file, a pipe, a CI log).
//
//	rep := progress.New(progress.Options{Epochs: 20, StepsPerEpoch: progress.Steps(n, 100)})
//	history, err := m.Train(ctx, data, vae.TrainConfig{..., OnStep: rep.OnStep, OnEpoch: rep.OnEpoch})
//	rep.Done()
package progress
