package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"strconv"
	"strings"
	"time"

	"gorgonia.org/tensor"

	"lowerbound.dev/losses"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// Checkpoint metadata the server reads besides the model's own schema
// (vae.Model.Schema), standardizer (vae.Model.Standardizer) and alarm
// calibration (alarm.Get).
const (
	// extraScoreK and extraScoreSeed are the K and seed the calibration
	// scores were computed with (decimal strings, written by the telemetry
	// example and the demo model); extraScoreMean is "true" when they
	// were scored at the posterior mean.
	extraScoreK    = "score.k"
	extraScoreSeed = "score.seed"
	extraScoreMean = "score.mean"
	// extraLabels is the JSON list of the class names of a conditional
	// model.
	extraLabels = "labels"
	// The keys of the first telemetry checkpoints (all-real sensors). They
	// are read only when the generic keys are absent:
	// telemetry.station_types names the classes, telemetry.features and
	// telemetry.standardizer stand in for a schema of real columns and
	// for the standardizer.
	legacyTypes        = "telemetry.station_types"
	legacyFeatures     = "telemetry.features"
	legacyStandardizer = "telemetry.standardizer"
)

// column is one column of the served model's records.
type column struct {
	dataset.SchemaColumn
	mean, std float64 // the standardisation: model input = (raw - mean) / std
}

// scoring is how a loaded model scores: the settings and where they came
// from.
type scoring struct {
	K    int    `json:"k"`
	Seed uint64 `json:"seed"`
	Mean bool   `json:"mean"`
	// From says where K came from: "checkpoint" (its score.k), "flag" or
	// "default".
	From string `json:"from"`
}

// loaded is one checkpoint ready to serve. It is never changed after
// loading: a reload builds a new one and swaps the pointer.
type loaded struct {
	path    string
	model   *vae.Model
	cols    []column
	byName  map[string]int
	mixed   *losses.Columns // nil unless the likelihood is a losses.Columns
	labels  []string        // class names of a conditional model (may be empty)
	cal     *alarm.Calibration
	score   scoring
	scorer  *vae.Scorer
	lean    bool   // the Scorer serves every request (else Model.Score / ScoreColumns)
	why     string // why not lean
	f32     bool
	scaled  bool // the checkpoint has a standardizer
	example []any
	at      time.Time
}

// missingOK reports whether records may have missing values: the model's
// likelihood must sum over the observed entries only (losses.Columns).
func (l *loaded) missingOK() bool { return l.mixed != nil }

// load reads a checkpoint and what the scoring needs from its metadata.
func load(ctx context.Context, path string, opt Options, log *slog.Logger) (*loaded, error) {
	m, err := vae.Load(path)
	if err != nil {
		return nil, err
	}
	l := &loaded{path: path, model: m, at: time.Now(), f32: m.Dtype() == tensor.Float32}
	l.mixed, _ = m.Likelihood().(*losses.Columns)
	if err := l.readColumns(); err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	if err := l.readLabels(); err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	switch cal, err := alarm.Get(m); {
	case err == nil:
		l.cal = cal
	case !errors.Is(err, alarm.ErrNoCalibration):
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	if l.score, err = resolveScoring(m.Extra(), l.cal != nil, opt); err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	if l.cal != nil && l.score.From != "checkpoint" {
		log.Warn("the checkpoint does not record the K its alarm calibration was scored with (metadata score.k): flags and p-values are valid only if it was scored as the server scores",
			"path", path, "k", l.score.K, "mean", l.score.Mean)
	}
	l.scorer, err = m.NewScorer(vae.ScorerOptions{K: l.score.K, Seed: l.score.Seed, Mean: l.score.Mean})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	l.example = l.exampleRecord()
	l.lean, l.why = l.probe(ctx)
	if !l.lean {
		log.Info("scoring through Model.Score (the graphs), not the lean Scorer", "path", path, "why", l.why)
	}
	return l, nil
}

// readColumns sets the columns from the checkpoint's schema and
// standardizer (or the legacy telemetry keys, or generic names).
func (l *loaded) readColumns() error {
	m, f := l.model, l.model.Features()
	extra := m.Extra()
	sc, ok, err := m.Schema()
	switch {
	case err != nil:
		return err
	case ok:
	case extra[legacyFeatures] != "":
		var names []string
		if err := json.Unmarshal([]byte(extra[legacyFeatures]), &names); err != nil || len(names) != f {
			return fmt.Errorf("metadata %s: want %d names (%v)", legacyFeatures, f, err)
		}
		for _, n := range names {
			sc.Columns = append(sc.Columns, dataset.SchemaColumn{Name: n, Kind: dataset.KindReal})
		}
	case l.mixed != nil:
		// No schema: the likelihood's columns, categories by index.
		for j, c := range l.mixed.Schema() {
			col := dataset.SchemaColumn{Name: c.Name, Kind: string(c.Kind)}
			if col.Name == "" {
				col.Name = "column_" + strconv.Itoa(j)
			}
			for k := 0; k < c.Categories; k++ {
				col.Categories = append(col.Categories, strconv.Itoa(k))
			}
			sc.Columns = append(sc.Columns, col)
		}
	default:
		for j := 0; j < f; j++ {
			sc.Columns = append(sc.Columns, dataset.SchemaColumn{Name: "feature_" + strconv.Itoa(j), Kind: dataset.KindReal})
		}
	}
	if err := sc.Validate(); err != nil {
		return fmt.Errorf("schema: %w", err)
	}
	if len(sc.Columns) != f {
		return fmt.Errorf("schema: %d columns, the model has %d features", len(sc.Columns), f)
	}
	if l.mixed != nil {
		for j, c := range l.mixed.Schema() {
			s := sc.Columns[j]
			if string(c.Kind) != s.Kind || c.Categories != len(s.Categories) {
				return fmt.Errorf("schema: column %d (%q) is %s with %d categories, the likelihood's is %s with %d", j, s.Name, s.Kind, len(s.Categories), c.Kind, c.Categories)
			}
		}
	} else {
		for j, s := range sc.Columns {
			if s.Kind != dataset.KindReal {
				return fmt.Errorf("schema: column %d (%q) is %s, but the model's likelihood (%T) is not a losses.Columns: every column must be real", j, s.Name, s.Kind, m.Likelihood())
			}
		}
	}

	z, ok, err := m.Standardizer()
	switch {
	case err != nil:
		return err
	case ok:
		l.scaled = true
	case extra[legacyStandardizer] != "":
		if err := json.Unmarshal([]byte(extra[legacyStandardizer]), &z); err != nil {
			return fmt.Errorf("metadata %s: %w", legacyStandardizer, err)
		}
		if err := z.Validate(); err != nil || len(z.Mean) != f {
			return fmt.Errorf("metadata %s: want %d features (%v)", legacyStandardizer, f, err)
		}
		l.scaled = true
	}
	l.byName = make(map[string]int, f)
	for j, s := range sc.Columns {
		c := column{SchemaColumn: s, mean: 0, std: 1}
		if l.scaled {
			c.mean, c.std = z.Mean[j], z.Std[j]
		}
		if s.Kind == dataset.KindCategorical && (c.mean != 0 || c.std != 1) {
			return fmt.Errorf("standardizer: column %d (%q) is categorical but has mean %v and std %v; want 0 and 1", j, s.Name, c.mean, c.std)
		}
		l.cols = append(l.cols, c)
		l.byName[s.Name] = j
	}
	return nil
}

// readLabels reads the class names of a conditional model.
func (l *loaded) readLabels() error {
	classes := l.model.Classes()
	if classes == 0 {
		return nil
	}
	for _, key := range []string{extraLabels, legacyTypes} {
		s := l.model.Extra()[key]
		if s == "" {
			continue
		}
		if err := json.Unmarshal([]byte(s), &l.labels); err != nil || len(l.labels) != classes {
			return fmt.Errorf("metadata %s: want %d class names (%v)", key, classes, err)
		}
		return nil
	}
	return nil
}

// resolveScoring chooses K, seed and the mean score. A checkpoint with a
// calibration is scored as its calibration was (metadata score.k,
// score.mean), and an explicit option that conflicts is an error, since a
// threshold calibrated at one K is not valid at another. Otherwise the
// explicit options win, then the checkpoint's settings, then K = 1. The
// seed is the explicit one, else the checkpoint's, else opt.Seed.
func resolveScoring(extra map[string]string, calibrated bool, opt Options) (scoring, error) {
	s := scoring{K: max(opt.K, 1), Seed: opt.Seed, Mean: opt.Mean, From: "default"}
	if opt.K > 0 || opt.Mean {
		s.From = "flag"
	}
	if v, ok := extra[extraScoreSeed]; ok && !opt.SeedSet {
		seed, err := strconv.ParseUint(v, 10, 64)
		if err != nil {
			return s, fmt.Errorf("metadata %s: %q is not a seed", extraScoreSeed, v)
		}
		s.Seed = seed
	}
	v, recorded := extra[extraScoreK]
	if recorded && (calibrated || s.From == "default") {
		k, err := strconv.Atoi(v)
		if err != nil || k < 1 {
			return s, fmt.Errorf("metadata %s: %q is not a K >= 1", extraScoreK, v)
		}
		mean := extra[extraScoreMean] == "true"
		if calibrated && opt.K > 0 && opt.K != k {
			return s, fmt.Errorf("-k %d conflicts with the checkpoint: its alarm calibration was scored with K = %d (metadata %s), and a threshold calibrated at one K is not valid at another; drop -k (or recalibrate at K = %d)", opt.K, k, extraScoreK, opt.K)
		}
		if calibrated && opt.Mean != mean {
			how := map[bool]string{true: "at the posterior mean", false: "by sampling"}
			return s, fmt.Errorf("-mean=%v conflicts with the checkpoint: its alarm calibration was scored %s (metadata %s), and its threshold is valid only for scores computed the same way", opt.Mean, how[mean], extraScoreMean)
		}
		s.K, s.Mean, s.From = k, mean, "checkpoint"
	}
	if s.Mean && s.K > 1 {
		return s, fmt.Errorf("-mean scores at the posterior mean; K = %d (%s) asks for importance samples: give one or the other", s.K, s.From)
	}
	return s, nil
}

// exampleRecord returns a record in raw units every column accepts: each
// real column at its training mean (the standardizer's), a positive one
// 1 standard deviation above it, counts and binaries at 0 and the first
// category. It shows the format; it need not be a normal record.
func (l *loaded) exampleRecord() []any {
	out := make([]any, len(l.cols))
	for j, c := range l.cols {
		switch c.Kind {
		case dataset.KindCategorical:
			out[j] = c.Categories[0]
		case dataset.KindPositive:
			out[j] = c.mean + c.std
		case dataset.KindReal:
			out[j] = c.mean
		default:
			out[j] = c.mean // 0 after standardisation
		}
	}
	return out
}

// probe checks that the Scorer serves this model in full (missing values,
// keys, per-column terms) and agrees with Model.Score (ScoreColumns) on a
// record; when it does not, the server scores through Model.Score.
func (l *loaded) probe(ctx context.Context) (bool, string) {
	if lean, err := l.scorer.Lean(); !lean {
		return false, fmt.Sprint(err)
	}
	f := len(l.cols)
	x := make([]float64, f)
	for j, c := range l.cols {
		switch c.Kind {
		case dataset.KindPositive:
			x[j] = 1
		case dataset.KindReal:
			x[j] = 0.5
		}
	}
	if l.missingOK() && f > 1 {
		x[0] = math.NaN()
	}
	var labels []int
	if l.model.Classes() > 0 {
		labels = []int{l.model.Classes() - 1}
	}
	keys := []uint64{12345}
	got, gotCols := make([]float64, 1), make([]float64, f)
	if err := l.scorer.Score(ctx, got, vae.Records{X: x, Labels: labels, Keys: keys}, gotCols); err != nil {
		return false, "the Scorer cannot score this model's records: " + err.Error()
	}
	want, wantCols, err := l.graphScore(ctx, x, labels, keys, true)
	if err != nil {
		return false, "probe through Model.Score: " + err.Error()
	}
	// The lean path equals the graphs to 1e-12 (float64) or 1e-5
	// (float32) relative; allow 1e-4 here.
	close := func(a, b float64) bool { return math.Abs(a-b) <= 1e-4*(1+math.Abs(b)) }
	if !close(got[0], want[0]) {
		return false, fmt.Sprintf("the Scorer's probe score %v differs from Model.Score's %v", got[0], want[0])
	}
	for j := range wantCols {
		if !close(gotCols[j], wantCols[j]) {
			return false, fmt.Sprintf("the Scorer's probe term of column %q %v differs from Model.ScoreColumns' %v", l.cols[j].Name, gotCols[j], wantCols[j])
		}
	}
	return true, ""
}

// graphScore scores standardised records (NaN where missing) through
// Model.Score, or Model.ScoreColumns when columns is set (which needs a
// losses.Columns likelihood; else the terms are nil).
func (l *loaded) graphScore(ctx context.Context, x []float64, labels []int, keys []uint64, columns bool) ([]float64, []float64, error) {
	m, f := l.model, len(l.cols)
	n := len(x) / f
	var set *dataset.Set
	var err error
	if l.missingOK() {
		set, err = dataset.NewMissing(x, n, f)
	} else {
		set, err = dataset.New(x, n, f)
	}
	if err != nil {
		return nil, nil, err
	}
	if m.Classes() > 0 {
		if set, err = set.WithLabels(labels, m.Classes()); err != nil {
			return nil, nil, err
		}
	}
	opt := vae.ScoreOptions{K: l.score.K, Seed: l.score.Seed, Keys: keys, AtPosteriorMean: l.score.Mean}
	if l.score.Mean {
		opt.K = 1
	}
	if columns && l.mixed != nil {
		scores, contrib, err := m.ScoreColumns(ctx, set, opt)
		if err != nil {
			return nil, nil, err
		}
		return scores, contrib.RawMatrix().Data, nil
	}
	scores, err := m.Score(ctx, set, opt)
	return scores, nil, err
}

// columnNames returns the names of the columns, comma separated.
func (l *loaded) columnNames() string {
	names := make([]string, len(l.cols))
	for j, c := range l.cols {
		names[j] = c.Name
	}
	return strings.Join(names, ", ")
}
