package main

import (
	"cmp"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"image/color"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"time"

	"gonum.org/v1/gonum/mat"
	"gorgonia.org/tensor"

	"lowerbound.dev/examples/internal/detect"
	"lowerbound.dev/examples/internal/fleet"
	"lowerbound.dev/examples/internal/plots"
	"lowerbound.dev/examples/internal/progress"
	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// Checkpoint metadata keys written with Model.SetExtra. The alarm
// calibration goes under alarm.MetadataKey (alarm.Put).
const (
	// The class (station type) names of the conditional model, a JSON
	// list; the columns and their standardisation travel as the model's
	// schema and standardizer (Model.SetSchema, Model.SetStandardizer).
	extraLabels = "labels"
	// The score settings the calibration scores were computed with
	// (decimal strings): a threshold calibrated at one K is not valid at
	// another, so a scoring service must score with the same K.
	extraScoreK    = "score.k"
	extraScoreSeed = "score.seed"
)

// putScoreOptions records in m's metadata the K and seed the alarm
// calibration was scored with.
func putScoreOptions(m *vae.Model, k int, seed uint64) error {
	if err := m.SetExtra(extraScoreK, strconv.Itoa(k)); err != nil {
		return err
	}
	return m.SetExtra(extraScoreSeed, strconv.FormatUint(seed, 10))
}

// standardize fits the standardisation of the real columns of sc on the
// observed readings of the first set (the training records) and applies it
// to every set.
func standardize(sc dataset.Schema, sets ...*dataset.Set) (dataset.Standardizer, []*dataset.Set, error) {
	z, err := dataset.FitStandardizerSchema(sets[0], sc)
	if err != nil {
		return z, nil, err
	}
	out := make([]*dataset.Set, len(sets))
	for i, s := range sets {
		if out[i], err = z.Apply(s); err != nil {
			return z, nil, err
		}
	}
	return z, out, nil
}

// reloadDiff scores raw with the trained model m in memory, standardised
// by z, and returns the largest difference from scores, which came from the
// model read back from its checkpoint: 0 when the round trip is exact.
func reloadDiff(ctx context.Context, m *vae.Model, z dataset.Standardizer, raw *dataset.Set, scores []float64, k int, seed uint64) (float64, error) {
	scaled, err := z.Apply(raw)
	if err != nil {
		return 0, err
	}
	direct, err := m.Score(ctx, scaled, vae.ScoreOptions{K: k, Seed: seed})
	if err != nil {
		return 0, err
	}
	var d float64
	for i := range direct {
		d = math.Max(d, math.Abs(direct[i]-scores[i]))
	}
	return d, nil
}

// saveCheckpoint writes out/model.safetensors: the weights and model
// description, the schema and standardisation that read and scale raw
// records, the alarm calibration and the K and seed it was scored with. It
// returns the file's path.
func saveCheckpoint(m *vae.Model, out string, sc dataset.Schema, z dataset.Standardizer, cal *alarm.Calibration, k int, seed uint64) (string, error) {
	if err := m.SetSchema(sc); err != nil {
		return "", err
	}
	if err := m.SetStandardizer(z); err != nil {
		return "", err
	}
	if err := alarm.Put(m, cal); err != nil {
		return "", err
	}
	if err := putScoreOptions(m, k, seed); err != nil {
		return "", err
	}
	path := filepath.Join(out, "model.safetensors")
	return path, m.Save(path)
}

// Disclaimer is printed by the program and stated in its documentation.
const Disclaimer = "The scores are a screening aid, not a protection system: alarms, trips and inspections follow the site's own procedures, local codes and qualified staff."

// Config is everything run needs. DefaultConfig gives the values of the
// command's flags.
type Config struct {
	Out      string // output folder, created if missing
	Seed     uint64 // data, weights, shuffling and scoring noise
	Epochs   int
	Stations int
	// HistoryDays of normal operation precede the test period: the last
	// CalDays of them calibrate the alarms, the ValDays before those pick
	// the best epoch, and the rest train.
	HistoryDays int
	ValDays     int
	CalDays     int
	TestDays    int
	Interval    time.Duration
	K           int     // importance samples per score
	Alpha       float64 // false-alarm rate of the alarm threshold
	FDR         float64 // target false discovery rate of the batch screening
	// Screen is the length of one screening batch: the records of the
	// whole fleet in each such window of the test period are screened
	// together at the FDR target.
	Screen time.Duration
	// DriftDays is the length of the windows of the drift check.
	DriftDays int
	Latent    int
	Hidden    []int
	BatchSize int
	LearnRate float64
	// Sigma > 0 fixes the Gaussian likelihood's standard deviation (in
	// standardised units); zero learns one per sensor.
	Sigma float64
	// Missing is the fraction of sensor readings lost to transmitter
	// dropouts in the invented fleet (fleet.FleetConfig.Missing).
	Missing float64
	// NoImpute skips the MCAR imputation comparison.
	NoImpute bool
	// TrainFile and ScoreFile, when set, replace the invented fleet with
	// a user's CSV files (see runFiles); SchemaFile, optional, gives the
	// schema as JSON (without it every column is real).
	TrainFile, ScoreFile, SchemaFile string
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
		HistoryDays: 31,
		ValDays:     3,
		CalDays:     5,
		TestDays:    14,
		Interval:    10 * time.Minute,
		K:           16,
		Alpha:       0.01,
		FDR:         0.1,
		Screen:      24 * time.Hour,
		DriftDays:   7,
		Latent:      4,
		Hidden:      []int{64, 32},
		BatchSize:   128,
		LearnRate:   2e-3,
	}
}

// FaultMetrics is the detection quality for one fault type (or all faults
// together): its records against the normal records of the test period,
// at the alarm threshold and under the FDR screening.
type FaultMetrics struct {
	Name    string
	Records int
	// Alarm counts the records above the alarm threshold; Screened those
	// flagged by the Benjamini-Hochberg screening of their batch.
	Alarm, Screened detect.Detection
	AUC             float64
}

// FalseAlarms is the observed false-alarm rate on normal records with its
// Clopper-Pearson interval.
type FalseAlarms struct {
	Alarms, Records int
	Rate, Low, High float64
}

// DriftWindow is the drift check of one window of the test period: the
// scores of its normal records against the calibration scores.
type DriftWindow struct {
	From, To time.Time
	alarm.Drift
	// AllKS is the KS statistic of all the window's records, faults
	// included, against the calibration scores.
	AllKS float64
}

// EventResult is the detection of one injected fault.
type EventResult struct {
	fleet.FaultEvent
	// Flagged counts the event's records above the alarm threshold and
	// Screened those flagged by the FDR screening.
	Records, Flagged, Screened int
	// FirstFlag is the time from the event's first faulty record to its
	// first record above the threshold, or -1 when none was.
	FirstFlag time.Duration
	// Top names the inputs that contribute most to the event's alarms:
	// the columns with the largest mean contribution to the
	// reconstruction term over its alarmed records (all its records when
	// none alarmed), less their mean over the normal test records.
	Top []Contribution
}

// Contribution is one input's excess contribution, in nats, to the
// reconstruction term of the records it is computed over.
type Contribution struct {
	Name   string
	Excess float64
}

// ImputeRow is the MCAR imputation comparison at one missing rate: the
// model's conditional mean (vae.Model.Impute) against per-column mean
// imputation (the training mean; for the mode, the training majority).
type ImputeRow struct {
	Rate                       float64
	Hidden                     int     // sensor entries hidden
	RMSEModel, RMSEMean        float64 // sensors, standardised units
	ModeAccModel, ModeAccMajor float64 // operating mode, accuracy
	StartsMAEModel, StartsMAE  float64 // starts, mean absolute error
}

// Result is what run produces besides its files.
type Result struct {
	TrainRecords, ValRecords, CalRecords, TestRecords, NormalTestRecords int
	History                                                              []vae.EpochInfo
	// Calibration holds the alarm threshold (for a false-alarm rate of
	// Config.Alpha) and the calibration scores; Threshold is its threshold.
	Calibration *alarm.Calibration
	Threshold   float64
	// PerFault holds one entry per fault type in the order of fleet.Faults();
	// Overall pools every faulty record.
	PerFault []FaultMetrics
	Overall  FaultMetrics
	// NormalAlarms is the false-alarm rate observed on the test period's
	// normal records at the threshold, with its interval (95%).
	NormalAlarms FalseAlarms
	// Batches is the number of screening batches; ScreenFlags the records
	// they flagged, ScreenFalse the normal ones among them, and MeanFDP
	// the false discovery proportion averaged over the batches (a batch
	// without flags counts 0).
	Batches, ScreenFlags, ScreenFalse int
	MeanFDP                           float64
	// Drift holds the drift check of each window of DriftDays.
	Drift []DriftWindow
	// Events holds, per injected fault, how many of its records alarmed
	// and how soon after the fault began the first alarm came.
	Events []EventResult
	// ReloadMaxDiff is the largest difference between the test scores of
	// the trained model and of the model read back from its checkpoint
	// (with the standardisation read back too); it should be zero.
	ReloadMaxDiff float64
	// Imputation holds the MCAR imputation comparison (unless NoImpute).
	Imputation []ImputeRow
	// Paths of the files written.
	Checkpoint, ScoresCSV, ScoresPNG, ROCPNG string
	Duration                                 time.Duration
}

func (c Config) validate() error {
	if c.CalDays < 1 {
		return fmt.Errorf("-cal-days %d: want >= 1", c.CalDays)
	}
	if c.ValDays < 1 {
		return fmt.Errorf("-val-days %d: want >= 1", c.ValDays)
	}
	if c.HistoryDays <= c.ValDays+c.CalDays {
		return fmt.Errorf("-days %d, -val-days %d, -cal-days %d: want days > val-days + cal-days, to leave days to train on", c.HistoryDays, c.ValDays, c.CalDays)
	}
	if err := fleet.CheckFlags(c.Stations, c.HistoryDays, c.ValDays+c.CalDays, c.TestDays); err != nil {
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
	case !(c.Alpha > 0 && c.Alpha < 1):
		return fmt.Errorf("-alpha %v: want 0 < alpha < 1", c.Alpha)
	case !(c.FDR > 0 && c.FDR < 1):
		return fmt.Errorf("-fdr %v: want 0 < fdr < 1", c.FDR)
	case c.Screen < c.interval():
		return fmt.Errorf("-screen %v: want at least one sampling interval (%v)", c.Screen, c.interval())
	case c.DriftDays < 1:
		return fmt.Errorf("-drift-days %d: want >= 1", c.DriftDays)
	case c.Latent < 1:
		return fmt.Errorf("-latent %d: want >= 1", c.Latent)
	case c.Sigma < 0 || math.IsNaN(c.Sigma):
		return fmt.Errorf("-sigma %v: want >= 0", c.Sigma)
	case !(c.Missing >= 0 && c.Missing <= 0.9):
		return fmt.Errorf("-missing %v: want a fraction in [0, 0.9]", c.Missing)
	case (c.TrainFile == "") != (c.ScoreFile == ""):
		return fmt.Errorf("-train %q, -score %q: give both or neither", c.TrainFile, c.ScoreFile)
	case c.SchemaFile != "" && c.TrainFile == "":
		return fmt.Errorf("-schema %q: only with -train and -score", c.SchemaFile)
	}
	// The calibration needs enough records for alpha.
	need, err := alarm.RecordsNeeded(c.Alpha)
	if err != nil {
		return fmt.Errorf("-alpha: %w", err)
	}
	if have := c.CalDays * c.Stations * int(24*time.Hour/c.interval()); have < need {
		return fmt.Errorf("-cal-days %d with %d stations gives %d calibration records; -alpha %v needs at least %d", c.CalDays, c.Stations, have, c.Alpha, need)
	}
	return nil
}

// interval is the sampling interval with its default.
func (c Config) interval() time.Duration {
	if c.Interval == 0 {
		return 10 * time.Minute
	}
	return c.Interval
}

// run generates the fleet, trains on normal operation, calibrates the
// alarms on held-out normal days, checkpoints the model with its
// standardisation and calibration, reloads them, scores the test period,
// screens it, checks it for drift and writes the plots and the CSV.
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

	// 1. Invented data: train, validation (best epoch) and calibration
	// (alarm threshold) days from the history, then the test period.
	fl, err := fleet.GenerateFleet(fleet.FleetConfig{Stations: cfg.Stations, HistoryDays: cfg.HistoryDays, TestDays: cfg.TestDays,
		Interval: cfg.Interval, Seed: cfg.Seed, Missing: cfg.Missing})
	if err != nil {
		return res, err
	}
	calFrom := fleet.Start().AddDate(0, 0, cfg.HistoryDays-cfg.CalDays)
	valFrom := calFrom.AddDate(0, 0, -cfg.ValDays)
	trainRaw, heldOutRaw, testRaw, err := fl.MixedSets(valFrom)
	if err != nil {
		return res, err
	}
	_, heldOut := fleet.SplitAt(fl.History, valFrom)
	valRecs, calRecs := fleet.SplitAt(heldOut, calFrom)
	valRaw, err := fleet.ToMixedSet(valRecs)
	if err != nil {
		return res, fmt.Errorf("validation records: %w", err)
	}
	calRaw, err := fleet.ToMixedSet(calRecs)
	if err != nil {
		return res, fmt.Errorf("calibration records: %w", err)
	}
	if valRaw.Len()+calRaw.Len() != heldOutRaw.Len() {
		return res, fmt.Errorf("held-out split: %d + %d records, want %d", valRaw.Len(), calRaw.Len(), heldOutRaw.Len())
	}
	res.TrainRecords, res.ValRecords, res.CalRecords, res.TestRecords = trainRaw.Len(), valRaw.Len(), calRaw.Len(), testRaw.Len()
	fmt.Fprintf(log, "fleet: %d stations (%s), %d sensors, an operating mode and a start count every %v, %s of readings dropped out; train %d records (%d days), validation %d (%d days), calibration %d (%d days), test %d (%d days) with %d injected faults\n",
		cfg.Stations, typeSummary(fl.Stations), fleet.NumSensors, cfg.interval(), pct(float64(testRaw.Missing()+trainRaw.Missing())/float64(fleet.NumSensors*(testRaw.Len()+trainRaw.Len()))), res.TrainRecords, cfg.HistoryDays-cfg.ValDays-cfg.CalDays,
		res.ValRecords, cfg.ValDays, res.CalRecords, cfg.CalDays, res.TestRecords, cfg.TestDays, len(fl.Events))

	for _, ev := range fl.Events {
		what := ev.Fault.String()
		if ev.Sensor >= 0 {
			what += " (" + fleet.SensorNames()[ev.Sensor] + ")"
		}
		fmt.Fprintf(log, "  injected: station %2d (%s) %s from %s to %s\n", ev.Station, fleet.StationTypes()[fl.Stations[ev.Station].Type].Name,
			what, ev.Start.Format("Jan 2 15:04"), ev.End.Format("Jan 2 15:04"))
	}

	// 2. Standardise the sensors with statistics of the training records
	// only (observed readings; the mode and the starts stay raw).
	schema := fleet.MixedSchema()
	z, sets, err := standardize(schema, trainRaw, valRaw, calRaw)
	if err != nil {
		return res, err
	}
	train, val, calSet := sets[0], sets[1], sets[2]

	// 3. Model: a VAE conditioned on the station type over mixed columns
	// (Nazabal et al. 2020): Gaussian sensors, a categorical mode and a
	// Poisson start count; dropped-out readings are skipped.
	cols, err := vae.ColumnsFromSchema(schema, cfg.Sigma == 0)
	if err != nil {
		return res, err
	}
	for j := range cols {
		if cols[j].Kind == losses.ColumnReal && cfg.Sigma > 0 {
			cols[j].Sigma = cfg.Sigma
		}
	}
	lik, err := losses.NewColumns("likelihood", cols, tensor.Float32)
	if err != nil {
		return res, err
	}
	m, err := vae.NewMLP(vae.MLPConfig{Input: fleet.NumColumns, Hidden: cfg.Hidden, Latent: cfg.Latent, Classes: len(fleet.StationTypes()),
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
	fmt.Fprintf(log, "scoring %d calibration and %d test records with K = %d importance samples\n", calSet.Len(), testRaw.Len(), cfg.K)

	// 4. Alarm calibration from the scores of the calibration days, which
	// neither trained the model nor chose its epoch.
	calScores, err := m.Score(ctx, calSet, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed})
	if err != nil {
		return res, err
	}
	if res.Calibration, err = alarm.Calibrate(calScores, cfg.Alpha); err != nil {
		return res, err
	}
	res.Threshold = res.Calibration.Threshold()

	// 5. Checkpoint: weights, model description, schema, standardisation,
	// station-type names, the alarm calibration and its score settings in
	// one file.
	var typeNames []string
	for _, t := range fleet.StationTypes() {
		typeNames = append(typeNames, t.Name)
	}
	types, err := json.Marshal(typeNames)
	if err != nil {
		return res, err
	}
	if err := m.SetExtra(extraLabels, string(types)); err != nil {
		return res, err
	}
	if res.Checkpoint, err = saveCheckpoint(m, cfg.Out, schema, z, res.Calibration, cfg.K, cfg.Seed); err != nil {
		return res, err
	}

	// 6. Score the test period the way a separate scoring service would:
	// from the checkpoint alone.
	scorer, err := loadScorer(res.Checkpoint)
	if err != nil {
		return res, err
	}
	scores, contrib, err := scorer.score(ctx, testRaw, cfg.K, cfg.Seed)
	if err != nil {
		return res, err
	}
	// The round trip must not change a single score, nor the alarms.
	if res.ReloadMaxDiff, err = reloadDiff(ctx, m, z, testRaw, scores, cfg.K, cfg.Seed); err != nil {
		return res, err
	}
	if scorer.cal.Threshold() != res.Threshold || scorer.cal.N() != res.Calibration.N() {
		return res, fmt.Errorf("checkpoint calibration (threshold %v, n %d) differs from (%v, %d)",
			scorer.cal.Threshold(), scorer.cal.N(), res.Threshold, res.Calibration.N())
	}
	cal := scorer.cal

	// 7. Alarms, and the FDR screening of each batch of Screen.
	alarms, err := cal.Flags(scores)
	if err != nil {
		return res, err
	}
	pvalues := make([]float64, len(scores))
	screened := make([]bool, len(scores))
	batches := batchesOf(fl.Test, fl.Test[0].Time, cfg.Screen)
	for _, idx := range batches {
		bs := make([]float64, len(idx))
		for j, i := range idx {
			bs[j] = scores[i]
		}
		sc, err := cal.Screen(bs, cfg.FDR)
		if err != nil {
			return res, err
		}
		falseFlags := 0
		for j, i := range idx {
			pvalues[i], screened[i] = sc.PValues[j], sc.Flagged[j]
			if sc.Flagged[j] && fl.Test[i].Fault == fleet.Normal {
				falseFlags++
			}
		}
		res.ScreenFlags += sc.Count
		res.ScreenFalse += falseFlags
		if sc.Count > 0 {
			res.MeanFDP += float64(falseFlags) / float64(sc.Count)
		}
	}
	res.Batches = len(batches)
	res.MeanFDP /= float64(res.Batches)

	// 8. Metrics per fault type.
	byFault := make([][]float64, fleet.NumFaults)
	alarmBy := make([][]bool, fleet.NumFaults)
	screenBy := make([][]bool, fleet.NumFaults)
	for i, r := range fl.Test {
		byFault[r.Fault] = append(byFault[r.Fault], scores[i])
		alarmBy[r.Fault] = append(alarmBy[r.Fault], alarms[i])
		screenBy[r.Fault] = append(screenBy[r.Fault], screened[i])
	}
	normal := byFault[fleet.Normal]
	res.NormalTestRecords = len(normal)
	var all []float64
	var allAlarm, allScreen []bool
	for _, f := range fleet.Faults() {
		fm, err := metricsFor(f.String(), byFault[f], normal, alarmBy[f], alarmBy[fleet.Normal], screenBy[f], screenBy[fleet.Normal])
		if err != nil {
			return res, err
		}
		res.PerFault = append(res.PerFault, fm)
		all = append(all, byFault[f]...)
		allAlarm = append(allAlarm, alarmBy[f]...)
		allScreen = append(allScreen, screenBy[f]...)
	}
	if res.Overall, err = metricsFor("all faults", all, normal, allAlarm, alarmBy[fleet.Normal], allScreen, screenBy[fleet.Normal]); err != nil {
		return res, err
	}
	fa := FalseAlarms{Alarms: res.Overall.Alarm.FP, Records: res.NormalTestRecords}
	if fa.Records > 0 {
		fa.Rate = float64(fa.Alarms) / float64(fa.Records)
		if fa.Low, fa.High, err = alarm.ClopperPearson(fa.Alarms, fa.Records, 0.95); err != nil {
			return res, err
		}
	}
	res.NormalAlarms = fa

	// 9. Drift check per window of DriftDays: normal records against the
	// calibration scores (and all records, for contrast).
	window := time.Duration(cfg.DriftDays) * 24 * time.Hour
	for _, idx := range batchesOf(fl.Test, fl.Test[0].Time, window) {
		var normalW, allW []float64
		from, to := fl.Test[idx[0]].Time, fl.Test[idx[0]].Time
		for _, i := range idx {
			allW = append(allW, scores[i])
			if fl.Test[i].Fault == fleet.Normal {
				normalW = append(normalW, scores[i])
			}
			if t := fl.Test[i].Time; t.Before(from) {
				from = t
			} else if t.After(to) {
				to = t
			}
		}
		if len(normalW) == 0 {
			continue
		}
		d, err := cal.Drift(normalW, 0.95)
		if err != nil {
			return res, err
		}
		allKS, _, err := alarm.KolmogorovSmirnov(allW, cal.Scores())
		if err != nil {
			return res, err
		}
		res.Drift = append(res.Drift, DriftWindow{From: from, To: to, Drift: d, AllKS: allKS})
	}

	// Baseline contribution of each column over the normal test records.
	nc := fleet.NumColumns
	base := make([]float64, nc)
	nNormal := 0
	for i, r := range fl.Test {
		if r.Fault == fleet.Normal {
			for j := range nc {
				base[j] += contrib.At(i, j)
			}
			nNormal++
		}
	}
	for j := range base {
		base[j] /= math.Max(1, float64(nNormal))
	}
	colNames := schema.Names()
	for _, ev := range fl.Events {
		er := EventResult{FaultEvent: ev, FirstFlag: -1}
		sum, sumAll := make([]float64, nc), make([]float64, nc)
		var onset time.Time
		for i, r := range fl.Test {
			if r.Station != ev.Station || r.Fault != ev.Fault {
				continue
			}
			if er.Records == 0 {
				onset = r.Time
			}
			er.Records++
			if screened[i] {
				er.Screened++
			}
			for j := range nc {
				sumAll[j] += contrib.At(i, j)
				if alarms[i] {
					sum[j] += contrib.At(i, j)
				}
			}
			if alarms[i] {
				if er.Flagged == 0 {
					er.FirstFlag = r.Time.Sub(onset)
				}
				er.Flagged++
			}
		}
		over := float64(er.Flagged)
		if er.Flagged == 0 {
			sum, over = sumAll, float64(er.Records)
		}
		er.Top = topContributions(colNames, sum, over, base, 3)
		res.Events = append(res.Events, er)
	}

	// 10. Imputation: hide readings of clean test records completely at
	// random and impute them.
	if !cfg.NoImpute {
		if res.Imputation, err = imputeCheck(ctx, m, z, trainRaw, fl.TestClean, cfg.Seed); err != nil {
			return res, err
		}
	}

	// 11. Files.
	res.ScoresCSV = filepath.Join(cfg.Out, "scores.csv")
	if err := writeScores(res.ScoresCSV, fl, scores, pvalues, alarms, screened); err != nil {
		return res, err
	}
	res.ScoresPNG = filepath.Join(cfg.Out, "scores.png")
	if err := plotScores(res.ScoresPNG, byFault, calScores, res.Calibration); err != nil {
		return res, err
	}
	res.ROCPNG = filepath.Join(cfg.Out, "roc.png")
	if err := plotROC(res.ROCPNG, byFault, res, cfg); err != nil {
		return res, err
	}
	res.Duration = time.Since(t0)
	return res, nil
}

// batchesOf groups the indices of recs by consecutive windows of length w
// from start (records of every station in one window together), in
// window order; empty windows are left out.
func batchesOf(recs []fleet.Record, start time.Time, w time.Duration) [][]int {
	byWindow := map[int][]int{}
	last := 0
	for i, r := range recs {
		b := int(r.Time.Sub(start) / w)
		byWindow[b] = append(byWindow[b], i)
		last = max(last, b)
	}
	var out [][]int
	for b := 0; b <= last; b++ {
		if idx := byWindow[b]; len(idx) > 0 {
			out = append(out, idx)
		}
	}
	return out
}

func metricsFor(name string, pos, neg []float64, posAlarm, negAlarm, posScreen, negScreen []bool) (FaultMetrics, error) {
	fm := FaultMetrics{Name: name, Records: len(pos), Alarm: detect.DetectFlags(posAlarm, negAlarm),
		Screened: detect.DetectFlags(posScreen, negScreen), AUC: math.NaN()}
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

// scorer is what a scoring service holds: the model, and the
// standardisation and alarm calibration read from the checkpoint.
type scorer struct {
	model *vae.Model
	z     dataset.Standardizer
	cal   *alarm.Calibration
}

func loadScorer(path string) (*scorer, error) {
	m, err := vae.Load(path)
	if err != nil {
		return nil, err
	}
	z, ok, err := m.Standardizer()
	if err == nil && !ok {
		err = errors.New("no standardizer in the metadata")
	}
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	cal, err := alarm.Get(m)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return &scorer{model: m, z: z, cal: cal}, nil
}

// score standardises raw records and scores them, with each column's
// contribution to the reconstruction term (N, columns).
func (s *scorer) score(ctx context.Context, raw *dataset.Set, k int, seed uint64) ([]float64, *mat.Dense, error) {
	x, err := s.z.Apply(raw)
	if err != nil {
		return nil, nil, err
	}
	return s.model.ScoreColumns(ctx, x, vae.ScoreOptions{K: k, Seed: seed})
}

// topContributions returns the n columns whose mean contribution
// sum[j]/over most exceeds base[j].
func topContributions(names []string, sum []float64, over float64, base []float64, n int) []Contribution {
	var out []Contribution
	for j := range sum {
		out = append(out, Contribution{Name: names[j], Excess: sum[j]/math.Max(over, 1) - base[j]})
	}
	slices.SortStableFunc(out, func(a, b Contribution) int { return cmp.Compare(b.Excess, a.Excess) })
	return out[:min(n, len(out))]
}

// imputeCheck hides entries of up to 2000 clean test records (no faults,
// no dropouts) completely at random at 10%, 30% and 50%, imputes them with
// the model (conditional mean at the posterior mean, mode for the
// operating mode) and with per-column means of the training records, and
// compares the errors on the hidden entries.
func imputeCheck(ctx context.Context, m *vae.Model, z dataset.Standardizer, trainRaw *dataset.Set, clean []fleet.Record, seed uint64) ([]ImputeRow, error) {
	recs := clean
	if len(recs) > 2000 {
		step := len(recs) / 2000
		recs = nil
		for i := 0; i < len(clean) && len(recs) < 2000; i += step {
			recs = append(recs, clean[i])
		}
	}
	for i := range recs {
		recs[i].Dropped = [fleet.NumSensors]bool{}
	}
	raw, err := fleet.ToMixedSet(recs)
	if err != nil {
		return nil, err
	}
	full, err := z.Apply(raw)
	if err != nil {
		return nil, err
	}
	// Training statistics: the majority mode and the mean start count
	// (the sensors' means are 0 after standardisation).
	counts := make([]int, len(fleet.Modes()))
	startsMean, nStarts := 0.0, 0
	for i := 0; i < trainRaw.Len(); i++ {
		row := trainRaw.Row(i)
		counts[int(row[fleet.ModeColumn])]++
		startsMean += row[fleet.StartsColumn]
		nStarts++
	}
	startsMean /= float64(max(nStarts, 1))
	major := slices.Index(counts, slices.Max(counts))
	var rows []ImputeRow
	for _, rate := range []float64{0.1, 0.3, 0.5} {
		rng := rand.New(rand.NewPCG(seed, uint64(rate*1000)))
		obs := make([]bool, full.Len()*fleet.NumColumns)
		for k := range obs {
			obs[k] = rng.Float64() >= rate
		}
		hidden, err := full.WithMissing(obs)
		if err != nil {
			return nil, err
		}
		imp, err := m.Impute(ctx, hidden)
		if err != nil {
			return nil, err
		}
		r := ImputeRow{Rate: rate}
		var se, seMean, absM, absMean float64
		var modeOK, modeMajor, nMode, nStartsH int
		for i := 0; i < full.Len(); i++ {
			truth := full.Row(i)
			for j := range fleet.NumColumns {
				if obs[i*fleet.NumColumns+j] {
					continue
				}
				v, t := imp.At(i, j), truth[j]
				switch j {
				case fleet.ModeColumn:
					nMode++
					if v == t {
						modeOK++
					}
					if float64(major) == t {
						modeMajor++
					}
				case fleet.StartsColumn:
					nStartsH++
					absM += math.Abs(v - t)
					absMean += math.Abs(startsMean - t)
				default:
					r.Hidden++
					se += (v - t) * (v - t)
					seMean += t * t
				}
			}
		}
		r.RMSEModel = math.Sqrt(se / float64(max(r.Hidden, 1)))
		r.RMSEMean = math.Sqrt(seMean / float64(max(r.Hidden, 1)))
		r.ModeAccModel = float64(modeOK) / float64(max(nMode, 1))
		r.ModeAccMajor = float64(modeMajor) / float64(max(nMode, 1))
		r.StartsMAEModel = absM / float64(max(nStartsH, 1))
		r.StartsMAE = absMean / float64(max(nStartsH, 1))
		rows = append(rows, r)
	}
	return rows, nil
}

func writeScores(path string, fl *fleet.Fleet, scores, pvalues []float64, alarms, screened []bool) (err error) {
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
	_ = w.Write([]string{"station", "station_type", "time", "fault", "score", "p_value", "alarm", "screened"})
	for i, r := range fl.Test {
		_ = w.Write([]string{strconv.Itoa(r.Station), types[r.Type].Name, r.Time.Format(time.RFC3339), r.Fault.String(),
			strconv.FormatFloat(scores[i], 'f', 4, 64), strconv.FormatFloat(pvalues[i], 'g', 6, 64),
			strconv.FormatBool(alarms[i]), strconv.FormatBool(screened[i])})
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

// plotScores draws the score distributions relative to the alarm
// threshold, on a signed log scale: the normal records sit a few nats below
// it and the faults up to thousands of nats above it. The calibration
// scores are drawn too: the threshold is their rank-th smallest.
func plotScores(path string, byFault [][]float64, calScores []float64, cal *alarm.Calibration) error {
	threshold := cal.Threshold()
	rel := func(xs []float64) []float64 {
		out := make([]float64, len(xs))
		for i, x := range xs {
			out[i] = x - threshold
		}
		return out
	}
	groups := []plots.Group{
		{Name: "normal (calibration days)", Values: rel(calScores), Color: color.RGBA{R: 44, G: 160, B: 44, A: 255}},
		{Name: "normal (test period)", Values: rel(byFault[fleet.Normal]), Color: faultColor(fleet.Normal)},
	}
	for _, f := range fleet.Faults() {
		groups = append(groups, plots.Group{Name: f.String(), Values: rel(byFault[f]), Color: faultColor(f)})
	}
	all := slices.Concat(append(byFault, calScores)...)
	return plots.Histograms(path, groups, plots.HistogramOptions{
		Title:     "Test-period anomaly scores, -log p(x) (higher = less like normal operation)",
		XLabel:    "score minus alarm threshold, nats (signed log scale)",
		Min:       math.Min(slices.Min(all)-threshold, -1),
		Max:       math.Max(slices.Max(all)-threshold, 1),
		SignedLog: true,
		Bins:      60,
		Markers: []plots.Marker{{X: 0, Name: fmt.Sprintf("alarm threshold %.2f nats: split conformal, false-alarm rate <= %g%%; alarm to the right",
			threshold, 100*cal.Alpha())}},
	})
}

// plotROC draws the ROC curve of each fault type against the normal test
// records, with the operating points of the alarm threshold and of the FDR
// screening marked.
func plotROC(path string, byFault [][]float64, res Result, cfg Config) error {
	var curves []plots.Curve
	var points []plots.Point
	for i, f := range fleet.Faults() {
		if len(byFault[f]) == 0 || len(byFault[fleet.Normal]) == 0 {
			continue
		}
		fpr, tpr := detect.ROCCurve(byFault[f], byFault[fleet.Normal])
		fm := res.PerFault[i]
		curves = append(curves, plots.Curve{Name: fmt.Sprintf("%s (AUC %.3f)", f, fm.AUC), X: fpr, Y: tpr, Color: faultColor(f)})
		points = append(points,
			plots.Point{X: fm.Alarm.FalsePositiveRate(), Y: fm.Alarm.Recall(), Color: faultColor(f), Shape: 0},
			plots.Point{X: fm.Screened.FalsePositiveRate(), Y: fm.Screened.Recall(), Color: faultColor(f), Shape: 2})
	}
	if len(curves) == 0 {
		return errors.New("roc: no faulty or no normal test records")
	}
	if len(points) > 1 {
		points[0].Name = fmt.Sprintf("at the alarm threshold (alpha %g%%)", 100*cfg.Alpha)
		points[1].Name = fmt.Sprintf("FDR screening (target %g%%)", 100*cfg.FDR)
	}
	return plots.Curves(path, curves, plots.CurveOptions{
		Title:        "ROC per fault type vs normal test records",
		XLabel:       "false positive rate (normal records flagged)",
		YLabel:       "true positive rate (faulty records flagged)",
		Diagonal:     true,
		DiagonalName: "chance",
		Unit:         true,
		Points:       points,
	})
}
