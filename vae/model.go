package vae

import (
	"errors"
	"fmt"
	"sync"
	"sync/atomic"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/errs"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// ErrInvalidArgument is wrapped by every error that reports a bad argument
// or configuration field. It is the SDK's one sentinel for bad arguments:
// layers.ErrInvalidArgument, dataset.ErrInvalidArgument and
// schedule.ErrInvalidArgument hold the same value.
var ErrInvalidArgument = errs.InvalidArgument

// ErrConfig is wrapped by every error that reports a bad model or training
// configuration. The message names the field. A configuration error is a
// bad argument too: errors.Is(err, ErrInvalidArgument) holds for every
// error that wraps ErrConfig.
var ErrConfig error = configSentinel{}

// configSentinel is ErrConfig's type: its own message, and it unwraps to
// the shared bad-argument sentinel.
type configSentinel struct{}

func (configSentinel) Error() string { return "vae: invalid configuration" }
func (configSentinel) Unwrap() error { return errs.InvalidArgument }

// ErrNotConditional is returned by label-taking calls on a model built
// without classes, and ErrLabel by calls given a label out of range.
var (
	ErrNotConditional = errors.New("vae: model is not conditional")
	ErrLabel          = errors.New("vae: label out of range")
)

func configError(field, format string, a ...any) error {
	return fmt.Errorf("%w: %s: %s", ErrConfig, field, fmt.Sprintf(format, a...))
}

// configWrap reports a bad field whose cause is err, keeping err's chain
// (errors.Is sees both ErrConfig and whatever err wraps).
func configWrap(field string, err error) error {
	return fmt.Errorf("%w: %s: %w", ErrConfig, field, err)
}

// Config assembles a model from its parts. The encoder, head and decoder are
// required; the rest have defaults.
//
// The model owns exactly the parameters its parts list in Params(): those
// are trained, saved, snapshotted and restored. A part that binds any other
// parameter in a graph is an error (wrapping ErrConfig) naming the part and
// the parameter, from New, or from the first call that builds a graph
// binding it.
type Config struct {
	// InputShape is the shape of one record: {F} for flat records or
	// {C, H, W} for images (channels first). Data always arrives flat, F
	// values per record in row-major order; image inputs are reshaped to
	// (N, C, H, W) in the graph before the encoder.
	InputShape []int
	// Encoder maps the encoder input to features of shape (N, H). For a
	// conditional model its input carries the label too (see Classes).
	Encoder layers.Layer
	// Head maps the features to the posterior's mean and log-variance.
	Head *layers.GaussianHead
	// Decoder maps z (N, D), or z and the one-hot label (N, D+Classes) for
	// a conditional model, to one output per feature: (N, F), or any shape
	// with N rows and F values per row, which is flattened.
	Decoder layers.Layer
	// Likelihood is the observation model; nil means losses.Bernoulli.
	Likelihood losses.Likelihood
	// Prior over z; nil means the standard normal.
	Prior priors.Prior
	// Classes > 0 makes the model conditional (Sohn et al. 2015) on a class
	// label in [0, Classes). For flat inputs the one-hot label is
	// concatenated to the encoder input, (N, F+Classes); for image inputs
	// it is appended as Classes constant planes, (N, C+Classes, H, W), all
	// ones in the plane of the true class. The one-hot label is
	// concatenated to z before the decoder.
	Classes int
	// Dtype of every parameter and computation; zero means Float32.
	Dtype tensor.Dtype
}

// Model is a variational autoencoder. Its inference methods (Encode, Decode,
// Reconstruct, Score, Evaluate, ...) are safe for concurrent use; Train must
// not run at the same time as any other method.
type Model struct {
	cfg   Config
	dtype tensor.Dtype
	width int // F, values per record
	// outWidth is the decoder's outputs per record: F, or the
	// likelihood's OutputWidth (a columns likelihood with categories).
	outWidth int
	// cols is the likelihood when it is a losses.Columns: the encoder
	// then sees the model-input layout and missing entries are skipped.
	cols   *losses.Columns
	latent int
	params []*layers.Param
	// owned holds every listed parameter: a graph may bind no other (see
	// program.owns), so the model trains, saves, snapshots and restores
	// the same set.
	owned map[*layers.Param]bool

	mu    sync.Mutex
	pools map[programKey][]*program
	// builds counts the programs compiled, per kind (read by tests).
	builds [kindDecodeRaw + 1]atomic.Int64
	// engine is held for writing while acquire compiles a program and
	// for reading while a program runs: gorgonia's NewTapeMachine writes
	// the engine field of every tensor bound to the graph, the shared
	// parameter tensors included, which races with programs reading them.
	engine sync.RWMutex

	// lean is the model's parts compiled for the lean inference path
	// (plan.go), or nil when a part is not supported: leanWhy then says
	// which. The inference methods run on it when it is set and on the
	// graphs otherwise; tests clear it to run the graph path.
	lean    *leanPlan
	leanWhy error
	// graphTrain makes Train use the graphs even when the lean training
	// path could run the model (set by tests that compare the two).
	graphTrain bool

	extra map[string]string
}

// New validates cfg and returns a model.
func New(cfg Config) (*Model, error) {
	if cfg.Dtype == (tensor.Dtype{}) {
		cfg.Dtype = tensor.Float32
	}
	if cfg.Dtype != tensor.Float32 && cfg.Dtype != tensor.Float64 {
		return nil, configError("Dtype", "%v is not float32 or float64", cfg.Dtype)
	}
	switch len(cfg.InputShape) {
	case 1, 3:
	default:
		return nil, configError("InputShape", "want {F} or {C, H, W}, have %v", cfg.InputShape)
	}
	width := 1
	for i, s := range cfg.InputShape {
		if s < 1 {
			return nil, configError("InputShape", "dimension %d is %d, want >= 1", i, s)
		}
		width *= s
	}
	if cfg.Encoder == nil {
		return nil, configError("Encoder", "nil")
	}
	if cfg.Head == nil {
		return nil, configError("Head", "nil")
	}
	if cfg.Decoder == nil {
		return nil, configError("Decoder", "nil")
	}
	if cfg.Classes < 0 {
		return nil, configError("Classes", "%d is negative", cfg.Classes)
	}
	latent := cfg.Head.Latent()
	if latent < 1 {
		return nil, configError("Head", "latent size %d, want >= 1", latent)
	}
	if cfg.Likelihood == nil {
		cfg.Likelihood = losses.Bernoulli{}
	}
	if cfg.Prior == nil {
		p, err := priors.NewStandardNormal(latent, cfg.Dtype)
		if err != nil {
			return nil, configWrap("Prior", err)
		}
		cfg.Prior = p
	}
	if cfg.Prior.Dim() != latent {
		return nil, configError("Prior", "dimension %d differs from the head's latent size %d", cfg.Prior.Dim(), latent)
	}
	outWidth := width
	if ow, ok := cfg.Likelihood.(interface{ OutputWidth() int }); ok {
		outWidth = ow.OutputWidth()
		if outWidth < 1 {
			return nil, configError("Likelihood", "output width %d, want >= 1", outWidth)
		}
	}
	cols, _ := cfg.Likelihood.(*losses.Columns)
	if cols != nil {
		if n := len(cols.Schema()); n != width || len(cfg.InputShape) != 1 {
			return nil, configError("Likelihood", "%d columns, and InputShape %v: want flat records of one value per column", n, cfg.InputShape)
		}
	}
	m := &Model{cfg: cfg, dtype: cfg.Dtype, width: width, outWidth: outWidth, cols: cols, latent: latent, pools: map[programKey][]*program{}}
	seen := map[string]string{}
	m.owned = map[*layers.Param]bool{}
	add := func(part string, ps []*layers.Param) error {
		for _, p := range ps {
			if p == nil || p.Value == nil {
				return configError(part, "a parameter is nil")
			}
			if p.Value.Dtype() != cfg.Dtype {
				return configError(part, "parameter %q is %v, model is %v", p.Name, p.Value.Dtype(), cfg.Dtype)
			}
			if other, ok := seen[p.Name]; ok {
				if other == part && m.owned[p] {
					continue // shared within one part (for example a tied layer)
				}
				if other == part {
					return configError(part, "lists two different parameters named %q", p.Name)
				}
				return configError(part, "parameter name %q is also used by the %s", p.Name, other)
			}
			seen[p.Name] = part
			m.owned[p] = true
			m.params = append(m.params, p)
		}
		return nil
	}
	for _, part := range []struct {
		name string
		ps   []*layers.Param
	}{
		{"Encoder", cfg.Encoder.Params()},
		{"Head", cfg.Head.Params()},
		{"Decoder", cfg.Decoder.Params()},
		{"Likelihood", cfg.Likelihood.Params()},
		{"Prior", cfg.Prior.Params()},
	} {
		if err := add(part.name, part.ps); err != nil {
			return nil, err
		}
	}
	// Build the smallest inference program once so that shape errors in
	// the parts surface here, not on first use.
	if _, err := m.build(programKey{kind: kindEvaluate, batch: 1, k: 1}); err != nil {
		if errors.Is(err, ErrConfig) {
			return nil, err
		}
		return nil, fmt.Errorf("%w: the parts do not fit together: %w", ErrConfig, err)
	}
	m.lean, _, m.leanWhy = m.leanPlan()
	return m, nil
}

// Latent returns the latent size D.
func (m *Model) Latent() int { return m.latent }

// Features returns F, the number of values per record.
func (m *Model) Features() int { return m.width }

// InputShape returns a copy of the per-record shape.
func (m *Model) InputShape() []int { return append([]int(nil), m.cfg.InputShape...) }

// Classes returns the number of classes of a conditional model, or 0.
func (m *Model) Classes() int { return m.cfg.Classes }

// Dtype returns the model's dtype.
func (m *Model) Dtype() tensor.Dtype { return m.dtype }

// Prior returns the model's prior.
func (m *Model) Prior() priors.Prior { return m.cfg.Prior }

// Likelihood returns the model's likelihood.
func (m *Model) Likelihood() losses.Likelihood { return m.cfg.Likelihood }

// Params returns every learnable parameter of the model, in a fixed order:
// encoder, head, decoder, likelihood, prior.
func (m *Model) Params() []*layers.Param { return append([]*layers.Param(nil), m.params...) }

// Extra returns a copy of the free-form metadata stored with the model in
// checkpoints (for example feature standardisation statistics).
func (m *Model) Extra() map[string]string {
	m.mu.Lock()
	defer m.mu.Unlock()
	out := make(map[string]string, len(m.extra))
	for k, v := range m.extra {
		out[k] = v
	}
	return out
}

// SetExtra stores a key and value that Save writes into the checkpoint
// metadata and Load restores. Keys starting with "lowerbound." are reserved.
func (m *Model) SetExtra(key, value string) error {
	if key == "" || len(key) >= len(reservedPrefix) && key[:len(reservedPrefix)] == reservedPrefix {
		return configError("key", "%q is empty or reserved", key)
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.extra == nil {
		m.extra = map[string]string{}
	}
	m.extra[key] = value
	return nil
}

const reservedPrefix = "lowerbound."
