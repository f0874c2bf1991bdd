package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
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
	Stations, HistoryDays, ValDays, CalDays int
	Interval                                time.Duration
	Missing                                 float64
	Hidden                                  []int
}

// demoFleet is smaller than the telemetry example's so that the server
// starts in seconds.
func demoFleet() fleetSize {
	return fleetSize{Stations: 4, HistoryDays: 8, ValDays: 1, CalDays: 1, Interval: 10 * time.Minute, Missing: 0.02, Hidden: []int{64, 32}}
}

// demoK is the K the demo model is calibrated (and so served) with when
// -k is not given: the telemetry example's default.
const demoK = 16

// trainDemo trains the kind of model the telemetry example trains
// (conditional on the station type, mixed columns: Gaussian sensors with
// learned sigmas, a categorical operating mode and a Poisson start count,
// dropped-out readings skipped) on the normal history of an invented
// fleet, calibrates its alarm threshold (false-alarm rate 1%) on held-out
// days scored with K importance samples and the seed, and writes it with
// its schema, standardizer, calibration, score settings and class names to
// out/model.safetensors, whose path it returns.
func trainDemo(ctx context.Context, out string, seed uint64, epochs, k int, size fleetSize) (string, error) {
	if err := os.MkdirAll(out, 0o755); err != nil {
		return "", err
	}
	fl, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: size.Stations, HistoryDays: size.HistoryDays, TestDays: 1,
		Interval: size.Interval, Seed: seed, Missing: size.Missing})
	if err != nil {
		return "", err
	}
	calFrom := fleet.Start().AddDate(0, 0, size.HistoryDays-size.CalDays)
	valFrom := calFrom.AddDate(0, 0, -size.ValDays)
	trainRecs, heldOut := fleet.SplitAt(fl.History, valFrom)
	valRecs, calRecs := fleet.SplitAt(heldOut, calFrom)
	schema := fleet.MixedSchema()
	var sets [3]*dataset.Set
	for i, recs := range [][]fleet.Record{trainRecs, valRecs, calRecs} {
		if sets[i], err = fleet.ToMixedSet(recs); err != nil {
			return "", err
		}
	}
	z, err := dataset.FitStandardizerSchema(sets[0], schema)
	if err != nil {
		return "", err
	}
	for i := range sets {
		if sets[i], err = z.Apply(sets[i]); err != nil {
			return "", err
		}
	}
	train, val, cal := sets[0], sets[1], sets[2]
	cols, err := vae.ColumnsFromSchema(schema, true)
	if err != nil {
		return "", err
	}
	lik, err := losses.NewColumns("likelihood", cols, tensor.Float32)
	if err != nil {
		return "", err
	}
	types := fleet.StationTypes()
	m, err := vae.NewMLP(vae.MLPConfig{Input: fleet.NumColumns, Hidden: size.Hidden, Latent: 4,
		Classes: len(types), Likelihood: lik, Seed: seed})
	if err != nil {
		return "", err
	}
	if _, err := m.Train(ctx, train, vae.TrainConfig{Epochs: epochs, BatchSize: 128, LearnRate: 2e-3, Seed: seed,
		Validation: val, RestoreBest: true}); err != nil {
		return "", fmt.Errorf("training: %w", err)
	}
	calScores, err := m.Score(ctx, cal, vae.ScoreOptions{K: k, Seed: seed})
	if err != nil {
		return "", err
	}
	c, err := alarm.Calibrate(calScores, 0.01)
	if err != nil {
		return "", err
	}
	if err := m.SetSchema(schema); err != nil {
		return "", err
	}
	if err := m.SetStandardizer(z); err != nil {
		return "", err
	}
	if err := alarm.Put(m, c); err != nil {
		return "", err
	}
	var typeNames []string
	for _, t := range types {
		typeNames = append(typeNames, t.Name)
	}
	names, err := json.Marshal(typeNames)
	if err != nil {
		return "", err
	}
	for key, v := range map[string]string{extraScoreK: strconv.Itoa(k), extraScoreSeed: strconv.FormatUint(seed, 10), extraLabels: string(names)} {
		if err := m.SetExtra(key, v); err != nil {
			return "", err
		}
	}
	path := filepath.Join(out, "model.safetensors")
	if err := m.Save(path); err != nil {
		return "", err
	}
	return path, nil
}
