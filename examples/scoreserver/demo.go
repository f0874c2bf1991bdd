package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"gorgonia.org/tensor"

	"lowerbound.dev/examples/internal/fleet"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// fleetSize is the invented fleet the demo model trains on.
type fleetSize struct {
	Stations, HistoryDays, ValDays int
	Interval                       time.Duration
	Hidden                         []int
}

// demoFleet is smaller than the telemetry example's so that the server
// starts in seconds.
func demoFleet() fleetSize {
	return fleetSize{Stations: 6, HistoryDays: 10, ValDays: 2, Interval: 10 * time.Minute, Hidden: []int{64, 32}}
}

// trainDemo trains the telemetry example's model (conditional on the
// station type, learned-sigma Gaussian likelihood) on the normal history
// of an invented fleet and writes it with the telemetry metadata to
// out/model.safetensors, whose path it returns. The threshold is the 99th
// percentile of the validation scores.
func trainDemo(ctx context.Context, out string, seed uint64, epochs int, size fleetSize) (string, error) {
	if err := os.MkdirAll(out, 0o755); err != nil {
		return "", err
	}
	fl, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: size.Stations, HistoryDays: size.HistoryDays, TestDays: 1,
		Interval: size.Interval, Seed: seed})
	if err != nil {
		return "", err
	}
	trainRaw, valRaw, _, err := fl.Sets(fleet.Start().AddDate(0, 0, size.HistoryDays-size.ValDays))
	if err != nil {
		return "", err
	}
	z, err := dataset.FitStandardizer(trainRaw)
	if err != nil {
		return "", err
	}
	train, err := z.Apply(trainRaw)
	if err != nil {
		return "", err
	}
	val, err := z.Apply(valRaw)
	if err != nil {
		return "", err
	}
	lik, err := losses.NewLearnedGaussian("likelihood", fleet.NumSensors, tensor.Float32)
	if err != nil {
		return "", err
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: fleet.NumSensors, Hidden: size.Hidden, Latent: 4,
		Classes: len(fleet.StationTypes()), Likelihood: lik, Seed: seed})
	if err != nil {
		return "", err
	}
	if _, err := m.Train(ctx, train, vae.TrainConfig{Epochs: epochs, BatchSize: 128, LearnRate: 2e-3, Seed: seed,
		Validation: val, RestoreBest: true}); err != nil {
		return "", fmt.Errorf("training: %w", err)
	}
	valScores, err := m.Score(ctx, val, vae.ScoreOptions{K: 1, Seed: seed})
	if err != nil {
		return "", err
	}
	cal, err := alarm.Calibrate(valScores, 0.01)
	if err != nil {
		return "", err
	}
	if err := alarm.Put(m, cal); err != nil {
		return "", err
	}
	zJSON, err := json.Marshal(z)
	if err != nil {
		return "", err
	}
	names, _ := json.Marshal(fleet.SensorNames())
	var typeNames []string
	for _, t := range fleet.StationTypes() {
		typeNames = append(typeNames, t.Name)
	}
	types, _ := json.Marshal(typeNames)
	for k, v := range map[string]string{extraStandardizer: string(zJSON), extraFeatures: string(names), extraTypes: string(types)} {
		if err := m.SetExtra(k, v); err != nil {
			return "", err
		}
	}
	path := filepath.Join(out, "model.safetensors")
	if err := m.Save(path); err != nil {
		return "", err
	}
	return path, nil
}
