package tabular

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"sort"
	"strconv"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"
	"gorgonia.org/tensor"

	"lowerbound.dev/vae"
	"lowerbound.dev/vae/alarm"
	"lowerbound.dev/vae/dataset"
)

// DefaultPrefix is the metadata prefix of the models this example trains.
const DefaultPrefix = "tabular"

// Metadata key suffixes, after "<prefix>.".
const (
	metaFeatures     = "features"
	metaStandardizer = "standardizer"
	metaThreshold    = "threshold"
)

// Meta is what the scoring pipeline needs besides the weights.
type Meta struct {
	Features     []string
	Standardizer dataset.Standardizer
	// Threshold is the alarm threshold in nats: the vae/alarm
	// calibration's when the checkpoint has one; NaN when it has none.
	Threshold float64
}

// SetMeta stores meta in m's extra metadata under prefix.
func SetMeta(m *vae.Model, prefix string, meta Meta) error {
	f, err := json.Marshal(meta.Features)
	if err != nil {
		return err
	}
	z, err := json.Marshal(meta.Standardizer)
	if err != nil {
		return err
	}
	if err := m.SetExtra(prefix+"."+metaFeatures, string(f)); err != nil {
		return err
	}
	if err := m.SetExtra(prefix+"."+metaStandardizer, string(z)); err != nil {
		return err
	}
	if !math.IsNaN(meta.Threshold) {
		return m.SetExtra(prefix+"."+metaThreshold, strconv.FormatFloat(meta.Threshold, 'g', -1, 64))
	}
	return nil
}

// ReadMeta reads the metadata SetMeta wrote and checks it against the model.
func ReadMeta(m *vae.Model, prefix string) (Meta, error) {
	extra := m.Extra()
	meta := Meta{Threshold: math.NaN()}
	key := func(s string) string { return prefix + "." + s }
	raw, ok := extra[key(metaFeatures)]
	if !ok {
		return meta, fmt.Errorf("tabular: checkpoint metadata has no %s (was the model saved with tabular.SetMeta and this prefix?)", key(metaFeatures))
	}
	if err := json.Unmarshal([]byte(raw), &meta.Features); err != nil {
		return meta, fmt.Errorf("tabular: checkpoint metadata %s: %w", key(metaFeatures), err)
	}
	if len(meta.Features) != m.Features() {
		return meta, fmt.Errorf("tabular: checkpoint metadata %s names %d columns, the model has %d features", key(metaFeatures), len(meta.Features), m.Features())
	}
	raw, ok = extra[key(metaStandardizer)]
	if !ok {
		return meta, fmt.Errorf("tabular: checkpoint metadata has no %s", key(metaStandardizer))
	}
	if err := json.Unmarshal([]byte(raw), &meta.Standardizer); err != nil {
		return meta, fmt.Errorf("tabular: checkpoint metadata %s: %w", key(metaStandardizer), err)
	}
	if err := meta.Standardizer.Validate(); err != nil {
		return meta, fmt.Errorf("tabular: checkpoint metadata %s: %w", key(metaStandardizer), err)
	}
	if len(meta.Standardizer.Mean) != m.Features() {
		return meta, fmt.Errorf("tabular: checkpoint metadata %s has %d features, the model %d", key(metaStandardizer), len(meta.Standardizer.Mean), m.Features())
	}
	// The alarm threshold is the vae/alarm calibration when the
	// checkpoint has one (the definition the telemetry example and the
	// scoring server use too); otherwise a plain number under
	// <prefix>.threshold, if any.
	switch cal, err := alarm.Get(m); {
	case err == nil:
		meta.Threshold = cal.Threshold()
		return meta, nil
	case !errors.Is(err, alarm.ErrNoCalibration):
		return meta, fmt.Errorf("tabular: %w", err)
	}
	if raw, ok := extra[key(metaThreshold)]; ok {
		t, err := strconv.ParseFloat(raw, 64)
		if err != nil || math.IsNaN(t) {
			return meta, fmt.Errorf("tabular: checkpoint metadata %s: %q is not a number", key(metaThreshold), raw)
		}
		meta.Threshold = t
	}
	return meta, nil
}

// ScoreConfig is how records are scored (see vae.ScoreOptions).
type ScoreConfig struct {
	K               int
	Seed            uint64
	AtPosteriorMean bool
}

// Scorer scores raw records with a model and its metadata. It is safe
// for concurrent use (vae.Model's inference is).
type Scorer struct {
	model *vae.Model
	meta  Meta
}

// NewScorer reads the metadata of m under prefix.
func NewScorer(m *vae.Model, prefix string) (*Scorer, error) {
	if m == nil {
		return nil, errors.New("tabular.NewScorer: nil model")
	}
	if m.Classes() > 0 {
		return nil, fmt.Errorf("tabular.NewScorer: the model is conditional on %d classes; this pipeline scores unconditional models only", m.Classes())
	}
	meta, err := ReadMeta(m, prefix)
	if err != nil {
		return nil, err
	}
	return &Scorer{model: m, meta: meta}, nil
}

// LoadScorer loads a checkpoint from a local path and reads its metadata.
func LoadScorer(path, prefix string) (*Scorer, error) {
	m, err := vae.Load(path)
	if err != nil {
		return nil, err
	}
	return NewScorer(m, prefix)
}

// Model returns the scorer's model.
func (s *Scorer) Model() *vae.Model { return s.model }

// Meta returns the scorer's metadata.
func (s *Scorer) Meta() Meta { return s.meta }

// Standardize appends the standardised values of rec to dst. A value the
// model cannot hold (beyond the float32 range for a float32 model) gives a
// dead letter instead: scoring it would fail the whole batch.
func (s *Scorer) Standardize(dst []float64, rec Record) ([]float64, *DeadLetter) {
	z := s.meta.Standardizer
	if len(rec.Values) != len(z.Mean) {
		return dst, &DeadLetter{File: rec.File, Line: rec.Line, Kind: KindWidth, Reason: fmt.Sprintf("%d features, the model wants %d", len(rec.Values), len(z.Mean))}
	}
	f32 := s.model.Dtype() == tensor.Float32
	n := len(dst)
	for j, v := range rec.Values {
		y := (v - z.Mean[j]) / z.Std[j]
		if math.IsInf(y, 0) || math.IsNaN(y) || (f32 && math.IsInf(float64(float32(y)), 0)) {
			return dst[:n], &DeadLetter{File: rec.File, Line: rec.Line, ColumnName: s.meta.Features[j], Kind: KindRange,
				Reason: fmt.Sprintf("value %v of column %q standardises to %v, beyond the range of the %v model", v, s.meta.Features[j], y, s.model.Dtype())}
		}
		dst = append(dst, y)
	}
	return dst, nil
}

// Score scores n standardised records held row-major in x, with one key
// per record.
func (s *Scorer) Score(ctx context.Context, x []float64, keys []uint64, cfg ScoreConfig) ([]float64, error) {
	set, err := dataset.New(x, len(keys), s.model.Features())
	if err != nil {
		return nil, err
	}
	return s.model.Score(ctx, set, vae.ScoreOptions{K: cfg.K, Seed: cfg.Seed, Keys: keys, AtPosteriorMean: cfg.AtPosteriorMean})
}

// Embed returns the posterior means of n standardised records held
// row-major in x, (n, D).
func (s *Scorer) Embed(ctx context.Context, x []float64, n int) (*mat.Dense, error) {
	set, err := dataset.New(x, n, s.model.Features())
	if err != nil {
		return nil, err
	}
	mean, _, err := s.model.Encode(ctx, set)
	return mean, err
}

// Quantile returns the empirical q-quantile of xs (gonum stat.Quantile,
// stat.Empirical); xs is not changed.
func Quantile(xs []float64, q float64) (float64, error) {
	if len(xs) == 0 || !(q > 0 && q < 1) {
		return 0, fmt.Errorf("tabular.Quantile: %d values, q %v: want values and 0 < q < 1", len(xs), q)
	}
	s := append([]float64(nil), xs...)
	sort.Float64s(s)
	return stat.Quantile(q, stat.Empirical, s, nil), nil
}
