package main

import (
	"context"
	"encoding/csv"
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"time"

	"gorgonia.org/tensor"

	"lowerbound.dev/examples/internal/plots"
	"lowerbound.dev/examples/internal/progress"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// FilesResult is what runFiles produces besides its files.
type FilesResult struct {
	Schema                                       dataset.Schema
	TrainRecords, ValRecords, CalRecords, Scored int
	MissingTrain, MissingScored                  int
	Calibration                                  *alarm.Calibration
	Scores                                       []float64
	Alarms                                       []bool
	// Top holds, per scored record, its three inputs of largest excess
	// contribution over the calibration records' mean.
	Top                                  [][]Contribution
	Checkpoint, ScoresCSV, ScoresPNG     string
	ReloadMaxDiff                        float64
	Duration                             time.Duration
	TrainFile, ScoreFile, SchemaFileRead string
}

// runFiles is the screening on a user's files: train on the records of
// cfg.TrainFile (a normal period; in file order, the first 70% train, the
// next 10% pick the best epoch and the last 20% calibrate the alarm
// threshold), then score cfg.ScoreFile with the model read back from its
// checkpoint, which carries the schema and the standardisation, so the
// scored file is read exactly as the training file was. Empty cells, NaN
// and NA are missing readings.
func runFiles(ctx context.Context, cfg Config) (FilesResult, error) {
	t0 := time.Now()
	res := FilesResult{TrainFile: cfg.TrainFile, ScoreFile: cfg.ScoreFile, SchemaFileRead: cfg.SchemaFile}
	log := cfg.Log
	if log == nil {
		log = io.Discard
	}
	if cfg.Progress == nil {
		cfg.Progress = log
	}
	if err := os.MkdirAll(cfg.Out, 0o755); err != nil {
		return res, err
	}
	sc, err := fileSchema(cfg)
	if err != nil {
		return res, err
	}
	res.Schema = sc
	all, err := readWithSchema(cfg.TrainFile, sc)
	if err != nil {
		return res, err
	}
	n := all.Len()
	nTrain, nVal := n*7/10, n/10
	idx := func(from, to int) []int {
		out := make([]int, 0, to-from)
		for i := from; i < to; i++ {
			out = append(out, i)
		}
		return out
	}
	need, err := alarm.RecordsNeeded(cfg.Alpha)
	if err != nil {
		return res, err
	}
	if nVal < 1 || n-nTrain-nVal < need {
		return res, fmt.Errorf("%s: %d records: the last 20%% (%d) calibrate the threshold and -alpha %v needs at least %d of them", cfg.TrainFile, n, n-nTrain-nVal, cfg.Alpha, need)
	}
	trainRaw, _ := all.Subset(idx(0, nTrain))
	valRaw, _ := all.Subset(idx(nTrain, nTrain+nVal))
	calRaw, _ := all.Subset(idx(nTrain+nVal, n))
	res.TrainRecords, res.ValRecords, res.CalRecords, res.MissingTrain = trainRaw.Len(), valRaw.Len(), calRaw.Len(), all.Missing()
	fmt.Fprintf(log, "%s: %d records of %d columns, %d readings missing; train %d, validation %d, calibration %d\n",
		cfg.TrainFile, n, len(sc.Columns), all.Missing(), res.TrainRecords, res.ValRecords, res.CalRecords)

	z, sets, err := standardize(sc, trainRaw, valRaw, calRaw)
	if err != nil {
		return res, err
	}
	train, val, calSet := sets[0], sets[1], sets[2]
	cols, err := vae.ColumnsFromSchema(sc, true)
	if err != nil {
		return res, err
	}
	lik, err := losses.NewColumns("likelihood", cols, tensor.Float32)
	if err != nil {
		return res, err
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: len(sc.Columns), Hidden: cfg.Hidden, Latent: cfg.Latent, Likelihood: lik, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	batch := max(cfg.BatchSize, 1)
	rep := progress.New(progress.Options{Out: cfg.Progress, Epochs: cfg.Epochs, StepsPerEpoch: progress.Steps(train.Len(), batch)})
	_, err = m.Train(ctx, train, vae.TrainConfig{Epochs: cfg.Epochs, BatchSize: batch, LearnRate: cfg.LearnRate, Seed: cfg.Seed,
		Validation: val, RestoreBest: true, OnStep: rep.OnStep, OnEpoch: rep.OnEpoch})
	trainTime := rep.Done()
	if err != nil {
		return res, fmt.Errorf("training: %w", err)
	}
	fmt.Fprintf(log, "trained in %.1fs\n", trainTime.Seconds())
	calScores, calContrib, err := m.ScoreColumns(ctx, calSet, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	if res.Calibration, err = alarm.Calibrate(calScores, cfg.Alpha); err != nil {
		return res, err
	}
	if res.Checkpoint, err = saveCheckpoint(m, cfg.Out, sc, z, res.Calibration, cfg.K, cfg.Seed); err != nil {
		return res, err
	}

	// Score from the checkpoint alone: its schema reads the file, its
	// standardisation scales it.
	s, err := loadScorer(res.Checkpoint)
	if err != nil {
		return res, err
	}
	stored, ok, err := s.model.Schema()
	if err != nil || !ok {
		return res, fmt.Errorf("%s: schema in the metadata: %v (present %v)", res.Checkpoint, err, ok)
	}
	raw, err := readWithSchema(cfg.ScoreFile, stored)
	if err != nil {
		return res, err
	}
	res.Scored, res.MissingScored = raw.Len(), raw.Missing()
	scores, contrib, err := s.score(ctx, raw, cfg.K, cfg.Seed)
	if err != nil {
		return res, err
	}
	if res.ReloadMaxDiff, err = reloadDiff(ctx, m, z, raw, scores, cfg.K, cfg.Seed); err != nil {
		return res, err
	}
	res.Scores = scores
	if res.Alarms, err = s.cal.Flags(scores); err != nil {
		return res, err
	}
	pv, err := s.cal.PValues(scores)
	if err != nil {
		return res, err
	}
	nc := len(sc.Columns)
	base := make([]float64, nc)
	r, _ := calContrib.Dims()
	for i := 0; i < r; i++ {
		for j := range nc {
			base[j] += calContrib.At(i, j) / float64(r)
		}
	}
	for i := range scores {
		res.Top = append(res.Top, topContributions(sc.Names(), contrib.RawRowView(i), 1, base, 3))
	}
	res.ScoresCSV = filepath.Join(cfg.Out, "scores.csv")
	if err := writeFileScores(res.ScoresCSV, scores, pv, res.Alarms, res.Top); err != nil {
		return res, err
	}
	res.ScoresPNG = filepath.Join(cfg.Out, "scores.png")
	th := res.Calibration.Threshold()
	rel := func(xs []float64) []float64 {
		out := make([]float64, len(xs))
		for i, x := range xs {
			out[i] = x - th
		}
		return out
	}
	both := slices.Concat(scores, calScores)
	if err := plots.Histograms(res.ScoresPNG, []plots.Group{
		{Name: "calibration (last 20% of -train)", Values: rel(calScores), Color: color.RGBA{R: 44, G: 160, B: 44, A: 255}},
		{Name: "scored file", Values: rel(scores), Color: color.RGBA{R: 214, G: 39, B: 40, A: 255}},
	}, plots.HistogramOptions{
		Title:     "Anomaly scores of " + filepath.Base(cfg.ScoreFile) + ", -log p(x_obs)",
		XLabel:    "score minus alarm threshold, nats (signed log scale)",
		Min:       math.Min(slices.Min(both)-th, -1),
		Max:       math.Max(slices.Max(both)-th, 1),
		SignedLog: true,
		Bins:      60,
		Markers:   []plots.Marker{{X: 0, Name: fmt.Sprintf("alarm threshold %.2f nats (false-alarm rate <= %g%%)", th, 100*cfg.Alpha)}},
	}); err != nil {
		return res, err
	}
	res.Duration = time.Since(t0)
	return res, nil
}

// fileSchema reads cfg.SchemaFile, or makes every column of the training
// file's header a real column.
func fileSchema(cfg Config) (dataset.Schema, error) {
	if cfg.SchemaFile != "" {
		f, err := os.Open(cfg.SchemaFile)
		if err != nil {
			return dataset.Schema{}, err
		}
		defer f.Close()
		return dataset.ReadSchema(f, cfg.SchemaFile)
	}
	f, err := os.Open(cfg.TrainFile)
	if err != nil {
		return dataset.Schema{}, err
	}
	defer f.Close()
	head, err := csv.NewReader(f).Read()
	if err != nil {
		return dataset.Schema{}, fmt.Errorf("%s: header: %w", cfg.TrainFile, err)
	}
	var sc dataset.Schema
	for _, h := range head {
		sc.Columns = append(sc.Columns, dataset.SchemaColumn{Name: h, Kind: dataset.KindReal})
	}
	return sc, sc.Validate()
}

func readWithSchema(path string, sc dataset.Schema) (*dataset.Set, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	s, _, err := dataset.ReadCSV(f, path, dataset.CSVOptions{Schema: &sc, Missing: true})
	return s, err
}

func writeFileScores(path string, scores, pv []float64, alarms []bool, top [][]Contribution) (err error) {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	defer func() {
		if cerr := f.Close(); err == nil {
			err = cerr
		}
	}()
	w := csv.NewWriter(f)
	_ = w.Write([]string{"record", "score", "p_value", "alarm", "top_inputs"})
	for i, s := range scores {
		_ = w.Write([]string{strconv.Itoa(i), strconv.FormatFloat(s, 'f', 4, 64), strconv.FormatFloat(pv[i], 'g', 6, 64),
			strconv.FormatBool(alarms[i]), topString(top[i])})
	}
	w.Flush()
	return w.Error()
}

func printFilesReport(w io.Writer, cfg Config, res FilesResult) {
	c := res.Calibration
	fmt.Fprintf(w, "\nalarm threshold %.2f nats (K = %d): split conformal, alpha = %g%%, from %d calibration records\n", c.Threshold(), cfg.K, 100*c.Alpha(), c.N())
	alarms := 0
	for _, a := range res.Alarms {
		if a {
			alarms++
		}
	}
	fmt.Fprintf(w, "%s: %d records, %d readings missing; %d alarm (%s)\n", res.ScoreFile, res.Scored, res.MissingScored, alarms, pct(ratio(alarms, res.Scored)))
	order := make([]int, len(res.Scores))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int { return cmpFloat(res.Scores[b], res.Scores[a]) })
	fmt.Fprintf(w, "\n%8s %10s %6s  %s\n", "record", "score", "alarm", "top inputs (excess nats over the calibration mean)")
	for _, i := range order[:min(10, len(order))] {
		fmt.Fprintf(w, "%8d %10.2f %6v  %s\n", i, res.Scores[i], res.Alarms[i], topString(res.Top[i]))
	}
	fmt.Fprintf(w, "\ncheckpoint round trip: largest score difference %g; schema, standardisation and calibration stored in %s\n", res.ReloadMaxDiff, res.Checkpoint)
	fmt.Fprintf(w, "wrote %s, %s, %s in %.1fs\n", res.ScoresPNG, res.Checkpoint, res.ScoresCSV, res.Duration.Seconds())
	fmt.Fprintln(w, Disclaimer)
}

func cmpFloat(a, b float64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}
