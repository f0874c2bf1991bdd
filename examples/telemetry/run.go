package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
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

	"lowerbound.dev/examples/internal/detect"
	"lowerbound.dev/examples/internal/fleet"
	"lowerbound.dev/examples/internal/plots"
	"lowerbound.dev/examples/internal/progress"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// Checkpoint metadata keys written with Model.SetExtra.
const (
	extraStandardizer = "telemetry.standardizer" // JSON of dataset.Standardizer
	extraFeatures     = "telemetry.features"     // JSON list of sensor names
	extraTypes        = "telemetry.station_types"
	extraThreshold    = "telemetry.threshold" // the alarm threshold, nats
)

// Disclaimer is printed by the program and stated in its documentation.
const Disclaimer = "The scores are a screening aid, not a protection system: alarms, trips and inspections follow the site's own procedures and qualified staff."

// Config is everything run needs. DefaultConfig gives the values of the
// command's flags.
type Config struct {
	Out         string // output folder, created if missing
	Seed        uint64 // data, weights, shuffling and scoring noise
	Epochs      int
	Stations    int
	HistoryDays int // normal days before the test period; the last ValDays of them are held out
	ValDays     int
	TestDays    int
	Interval    time.Duration
	K           int     // importance samples per score
	Quantile    float64 // of validation scores, the threshold
	Latent      int
	Hidden      []int
	BatchSize   int
	LearnRate   float64
	// Sigma > 0 fixes the Gaussian likelihood's standard deviation (in
	// standardised units); zero learns one per sensor.
	Sigma float64
	// Log receives the report; nil discards it. Progress receives the
	// training bar or epoch lines; nil means Log.
	Log, Progress io.Writer
}

// DefaultConfig returns the configuration of a default run.
func DefaultConfig() Config {
	return Config{
		Out:         filepath.Join("out", "telemetry"),
		Seed:        1,
		Epochs:      20,
		Stations:    12,
		HistoryDays: 28,
		ValDays:     5,
		TestDays:    7,
		Interval:    10 * time.Minute,
		K:           16,
		Quantile:    0.99,
		Latent:      4,
		Hidden:      []int{64, 32},
		BatchSize:   128,
		LearnRate:   2e-3,
	}
}

// FaultMetrics is the detection quality for one fault type (or all faults
// together): its records against the normal records of the test period.
type FaultMetrics struct {
	Name    string
	Records int
	detect.Detection
	AUC float64
}

// EventResult is the detection of one injected fault.
type EventResult struct {
	fleet.FaultEvent
	Records, Flagged int
	// FirstFlag is the time from the event's first faulty record to its
	// first flagged record, or -1 when none was flagged.
	FirstFlag time.Duration
}

// Result is what run produces besides its files.
type Result struct {
	TrainRecords, ValRecords, TestRecords, NormalTestRecords int
	History                                                  []vae.EpochInfo
	Threshold                                                float64
	// PerFault holds one entry per fault type in the order of fleet.Faults();
	// Overall pools every faulty record.
	PerFault []FaultMetrics
	Overall  FaultMetrics
	// NormalFlagRate is the fraction of the test period's normal records
	// flagged; the threshold aims at 1 - Quantile.
	NormalFlagRate float64
	// Events holds, per injected fault, how many of its records were
	// flagged and how soon after the fault began the first flag came.
	Events []EventResult
	// ReloadMaxDiff is the largest difference between the test scores of
	// the trained model and of the model read back from its checkpoint
	// (with the standardisation read back too); it should be zero.
	ReloadMaxDiff float64
	// Paths of the files written.
	Checkpoint, ScoresCSV, ScoresPNG, ROCPNG string
	Duration                                 time.Duration
}

func (c Config) validate() error {
	if err := fleet.CheckFlags(c.Stations, c.HistoryDays, c.ValDays, c.TestDays); err != nil {
		return err
	}
	switch {
	case c.Out == "":
		return errors.New("-out: empty")
	case c.Epochs < 1:
		return fmt.Errorf("-epochs %d: want >= 1", c.Epochs)
	case c.Interval != 0 && (c.Interval < time.Minute || c.Interval > 6*time.Hour):
		return fmt.Errorf("-interval %v: want between 1m and 6h", c.Interval)
	case c.K < 1:
		return fmt.Errorf("-k %d: want >= 1", c.K)
	case !(c.Quantile > 0 && c.Quantile < 1):
		return fmt.Errorf("-quantile %v: want 0 < q < 1", c.Quantile)
	case c.Latent < 1:
		return fmt.Errorf("-latent %d: want >= 1", c.Latent)
	case c.Sigma < 0 || math.IsNaN(c.Sigma):
		return fmt.Errorf("-sigma %v: want >= 0", c.Sigma)
	}
	return nil
}

// run generates the fleet, trains on normal operation, checkpoints the
// model with its standardisation, reloads both, scores the test period and
// writes the plots and the CSV.
func run(ctx context.Context, cfg Config) (Result, error) {
	t0 := time.Now()
	if err := cfg.validate(); err != nil {
		return Result{}, err
	}
	log := cfg.Log
	if log == nil {
		log = io.Discard
	}
	if cfg.Progress == nil {
		cfg.Progress = log
	}
	if err := os.MkdirAll(cfg.Out, 0o755); err != nil {
		return Result{}, err
	}
	var res Result

	// 1. Invented data.
	fl, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: cfg.Stations, HistoryDays: cfg.HistoryDays, TestDays: cfg.TestDays,
		Interval: cfg.Interval, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	valFrom := fleet.Start().AddDate(0, 0, cfg.HistoryDays-cfg.ValDays)
	trainRaw, valRaw, testRaw, err := fl.Sets(valFrom)
	if err != nil {
		return res, err
	}
	res.TrainRecords, res.ValRecords, res.TestRecords = trainRaw.Len(), valRaw.Len(), testRaw.Len()
	fmt.Fprintf(log, "fleet: %d stations (%s), %d sensors every %v; train %d records (%d days), validation %d (%d days), test %d (%d days) with %d injected faults\n",
		cfg.Stations, typeSummary(fl.Stations), fleet.NumSensors, cfg.Interval, res.TrainRecords, cfg.HistoryDays-cfg.ValDays,
		res.ValRecords, cfg.ValDays, res.TestRecords, cfg.TestDays, len(fl.Events))

	for _, ev := range fl.Events {
		what := ev.Fault.String()
		if ev.Sensor >= 0 {
			what += " (" + fleet.SensorNames()[ev.Sensor] + ")"
		}
		fmt.Fprintf(log, "  injected: station %2d (%s) %s from %s to %s\n", ev.Station, fleet.StationTypes()[fl.Stations[ev.Station].Type].Name,
			what, ev.Start.Format("Jan 2 15:04"), ev.End.Format("Jan 2 15:04"))
	}

	// 2. Standardise with statistics of the training records only.
	z, err := dataset.FitStandardizer(trainRaw)
	if err != nil {
		return res, err
	}
	train, err := z.Apply(trainRaw)
	if err != nil {
		return res, err
	}
	val, err := z.Apply(valRaw)
	if err != nil {
		return res, err
	}

	// 3. Model: a VAE conditioned on the station type, Gaussian likelihood.
	var lik losses.Likelihood = losses.Gaussian{Sigma: cfg.Sigma}
	if cfg.Sigma == 0 {
		if lik, err = losses.NewLearnedGaussian("likelihood", fleet.NumSensors, tensor.Float32); err != nil {
			return res, err
		}
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: fleet.NumSensors, Hidden: cfg.Hidden, Latent: cfg.Latent, Classes: len(fleet.StationTypes()),
		Likelihood: lik, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	batch := cfg.BatchSize
	if batch <= 0 {
		batch = 128
	}
	rep := progress.New(progress.Options{Out: cfg.Progress, Epochs: cfg.Epochs, StepsPerEpoch: progress.Steps(train.Len(), batch)})
	res.History, err = m.Train(ctx, train, vae.TrainConfig{Epochs: cfg.Epochs, BatchSize: batch, LearnRate: cfg.LearnRate,
		Seed: cfg.Seed, Validation: val, RestoreBest: true, OnStep: rep.OnStep, OnEpoch: rep.OnEpoch})
	trainTime := rep.Done()
	if err != nil {
		return res, fmt.Errorf("training: %w", err)
	}
	best := 0
	for _, e := range res.History {
		if e.Best {
			best = e.Epoch
		}
	}
	fmt.Fprintf(log, "trained %d epochs in %.1fs; kept the weights of epoch %d (best validation loss)\n", len(res.History), trainTime.Seconds(), best)
	fmt.Fprintf(log, "scoring %d validation and %d test records with K = %d importance samples\n", val.Len(), testRaw.Len(), cfg.K)

	// 4. Threshold from the validation scores of the trained model.
	valScores, err := m.Score(ctx, val, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	if res.Threshold, err = detect.Quantile(valScores, cfg.Quantile); err != nil {
		return res, err
	}

	// 5. Checkpoint: weights, model description, standardisation, sensor
	// names and threshold in one file.
	zJSON, err := json.Marshal(z)
	if err != nil {
		return res, err
	}
	names, _ := json.Marshal(fleet.SensorNames())
	var typeNames []string
	for _, t := range fleet.StationTypes() {
		typeNames = append(typeNames, t.Name)
	}
	types, _ := json.Marshal(typeNames)
	for k, v := range map[string]string{extraStandardizer: string(zJSON), extraFeatures: string(names), extraTypes: string(types),
		extraThreshold: strconv.FormatFloat(res.Threshold, 'g', -1, 64)} {
		if err := m.SetExtra(k, v); err != nil {
			return res, err
		}
	}
	res.Checkpoint = filepath.Join(cfg.Out, "model.safetensors")
	if err := m.Save(res.Checkpoint); err != nil {
		return res, err
	}

	// 6. Score the test period the way a separate scoring service would:
	// from the checkpoint alone.
	scorer, err := loadScorer(res.Checkpoint)
	if err != nil {
		return res, err
	}
	scores, err := scorer.score(ctx, testRaw, cfg.K, cfg.Seed)
	if err != nil {
		return res, err
	}
	// The round trip must not change a single score.
	test, err := z.Apply(testRaw)
	if err != nil {
		return res, err
	}
	direct, err := m.Score(ctx, test, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	for i := range scores {
		res.ReloadMaxDiff = math.Max(res.ReloadMaxDiff, math.Abs(scores[i]-direct[i]))
	}
	if scorer.threshold != res.Threshold {
		return res, fmt.Errorf("checkpoint threshold %v differs from %v", scorer.threshold, res.Threshold)
	}

	// 7. Metrics.
	byFault := make([][]float64, fleet.NumFaults)
	for i, r := range fl.Test {
		byFault[r.Fault] = append(byFault[r.Fault], scores[i])
	}
	normal := byFault[fleet.Normal]
	res.NormalTestRecords = len(normal)
	var all []float64
	for _, f := range fleet.Faults() {
		fm, err := metricsFor(f.String(), byFault[f], normal, res.Threshold)
		if err != nil {
			return res, err
		}
		res.PerFault = append(res.PerFault, fm)
		all = append(all, byFault[f]...)
	}
	if res.Overall, err = metricsFor("all faults", all, normal, res.Threshold); err != nil {
		return res, err
	}
	res.NormalFlagRate = res.Overall.FalsePositiveRate()
	for _, ev := range fl.Events {
		er := EventResult{FaultEvent: ev, FirstFlag: -1}
		var onset time.Time
		for i, r := range fl.Test {
			if r.Station != ev.Station || r.Fault != ev.Fault {
				continue
			}
			if er.Records == 0 {
				onset = r.Time
			}
			er.Records++
			if scores[i] > res.Threshold {
				if er.Flagged == 0 {
					er.FirstFlag = r.Time.Sub(onset)
				}
				er.Flagged++
			}
		}
		res.Events = append(res.Events, er)
	}

	// 8. Files.
	res.ScoresCSV = filepath.Join(cfg.Out, "scores.csv")
	if err := writeScores(res.ScoresCSV, fl, scores, res.Threshold); err != nil {
		return res, err
	}
	res.ScoresPNG = filepath.Join(cfg.Out, "scores.png")
	if err := plotScores(res.ScoresPNG, byFault, res.Threshold, cfg.Quantile); err != nil {
		return res, err
	}
	res.ROCPNG = filepath.Join(cfg.Out, "roc.png")
	if err := plotROC(res.ROCPNG, byFault, res); err != nil {
		return res, err
	}
	res.Duration = time.Since(t0)
	return res, nil
}

func metricsFor(name string, pos, neg []float64, threshold float64) (FaultMetrics, error) {
	fm := FaultMetrics{Name: name, Records: len(pos), Detection: detect.Detect(pos, neg, threshold), AUC: math.NaN()}
	if len(pos) > 0 && len(neg) > 0 {
		auc, err := detect.AUC(pos, neg)
		if err != nil {
			return fm, fmt.Errorf("%s: %w", name, err)
		}
		fm.AUC = auc
	}
	return fm, nil
}

func typeSummary(st []fleet.Station) string {
	counts := make([]int, len(fleet.StationTypes()))
	for _, s := range st {
		counts[s.Type]++
	}
	out := ""
	for i, t := range fleet.StationTypes() {
		if i > 0 {
			out += ", "
		}
		out += fmt.Sprintf("%d %s", counts[i], t.Name)
	}
	return out
}

// scorer is what a scoring service holds: the model and the
// standardisation and threshold read from the checkpoint.
type scorer struct {
	model     *vae.Model
	z         dataset.Standardizer
	threshold float64
}

func loadScorer(path string) (*scorer, error) {
	m, err := vae.Load(path)
	if err != nil {
		return nil, err
	}
	extra := m.Extra()
	var z dataset.Standardizer
	if err := json.Unmarshal([]byte(extra[extraStandardizer]), &z); err != nil {
		return nil, fmt.Errorf("%s: metadata %s: %w", path, extraStandardizer, err)
	}
	if err := z.Validate(); err != nil {
		return nil, fmt.Errorf("%s: metadata %s: %w", path, extraStandardizer, err)
	}
	if len(z.Mean) != m.Features() {
		return nil, fmt.Errorf("%s: standardisation has %d features, model %d", path, len(z.Mean), m.Features())
	}
	th, err := strconv.ParseFloat(extra[extraThreshold], 64)
	if err != nil {
		return nil, fmt.Errorf("%s: metadata %s: %w", path, extraThreshold, err)
	}
	return &scorer{model: m, z: z, threshold: th}, nil
}

// score standardises raw records and scores them.
func (s *scorer) score(ctx context.Context, raw *dataset.Set, k int, seed uint64) ([]float64, error) {
	x, err := s.z.Apply(raw)
	if err != nil {
		return nil, err
	}
	return s.model.Score(ctx, x, vae.ScoreOptions{K: k, Seed: seed})
}

func writeScores(path string, fl *fleet.Fleet, scores []float64, threshold float64) (err error) {
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
	types := fleet.StationTypes()
	_ = w.Write([]string{"station", "station_type", "time", "fault", "score", "flagged"})
	for i, r := range fl.Test {
		_ = w.Write([]string{strconv.Itoa(r.Station), types[r.Type].Name, r.Time.Format(time.RFC3339), r.Fault.String(),
			strconv.FormatFloat(scores[i], 'f', 4, 64), strconv.FormatBool(scores[i] > threshold)})
	}
	w.Flush()
	return w.Error()
}

// faultColor gives each label the same colour in every plot.
func faultColor(f fleet.Fault) color.Color {
	switch f {
	case fleet.BearingWear:
		return color.RGBA{R: 214, G: 39, B: 40, A: 255}
	case fleet.Cavitation:
		return color.RGBA{R: 31, G: 119, B: 180, A: 255}
	case fleet.StuckSensor:
		return color.RGBA{R: 255, G: 127, B: 14, A: 255}
	}
	return color.RGBA{R: 90, G: 90, B: 90, A: 255}
}

// plotScores draws the score distributions relative to the threshold, on
// a signed log scale: the normal records sit a few nats below it and the
// faults up to thousands of nats above it.
func plotScores(path string, byFault [][]float64, threshold, q float64) error {
	rel := func(xs []float64) []float64 {
		out := make([]float64, len(xs))
		for i, x := range xs {
			out[i] = x - threshold
		}
		return out
	}
	groups := []plots.Group{{Name: "normal (test period)", Values: rel(byFault[fleet.Normal]), Color: faultColor(fleet.Normal)}}
	for _, f := range fleet.Faults() {
		groups = append(groups, plots.Group{Name: f.String(), Values: rel(byFault[f]), Color: faultColor(f)})
	}
	all := slices.Concat(byFault...)
	return plots.Histograms(path, groups, plots.HistogramOptions{
		Title:     "Test-period anomaly scores, -log p(x) (higher = less like normal operation)",
		XLabel:    "score minus alarm threshold, nats (signed log scale)",
		Min:       math.Min(slices.Min(all)-threshold, -1),
		Max:       math.Max(slices.Max(all)-threshold, 1),
		SignedLog: true,
		Bins:      60,
		Markers:   []plots.Marker{{Name: fmt.Sprintf("threshold %.2f nats = %gth percentile of validation; flag to the right", threshold, 100*q), X: 0}},
	})
}

func plotROC(path string, byFault [][]float64, res Result) error {
	var curves []plots.Curve
	for i, f := range fleet.Faults() {
		if len(byFault[f]) == 0 || len(byFault[fleet.Normal]) == 0 {
			continue
		}
		fpr, tpr := detect.ROCCurve(byFault[f], byFault[fleet.Normal])
		curves = append(curves, plots.Curve{Name: fmt.Sprintf("%s (AUC %.3f)", f, res.PerFault[i].AUC), X: fpr, Y: tpr, Color: faultColor(f)})
	}
	if len(curves) == 0 {
		return errors.New("roc: no faulty or no normal test records")
	}
	return plots.Curves(path, curves, plots.CurveOptions{
		Title:        "ROC per fault type vs normal test records",
		XLabel:       "false positive rate (normal records flagged)",
		YLabel:       "true positive rate (faulty records flagged)",
		Diagonal:     true,
		DiagonalName: "chance",
		Unit:         true,
	})
}
