package vae

import (
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strings"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// ErrCheckpoint is wrapped by every error about a checkpoint's content.
var ErrCheckpoint = errors.New("vae: bad checkpoint")

const (
	metaFormat = reservedPrefix + "format"
	metaModel  = reservedPrefix + "model"
	formatV1   = "1"
)

type modelSpec struct {
	InputShape []int                 `json:"input_shape"`
	Classes    int                   `json:"classes,omitempty"`
	Dtype      string                `json:"dtype"`
	Latent     int                   `json:"latent"`
	Encoder    layers.Spec           `json:"encoder"`
	Head       layers.Spec           `json:"head"`
	Decoder    layers.Spec           `json:"decoder"`
	Likelihood losses.LikelihoodSpec `json:"likelihood"`
	Prior      priors.Spec           `json:"prior"`
}

func (m *Model) spec() (modelSpec, error) {
	s := modelSpec{InputShape: m.cfg.InputShape, Classes: m.cfg.Classes, Dtype: m.dtype.String(), Latent: m.latent, Head: m.cfg.Head.Spec()}
	enc, ok := m.cfg.Encoder.(layers.Describer)
	if !ok {
		return s, fmt.Errorf("the encoder (%T) does not implement layers.Describer", m.cfg.Encoder)
	}
	s.Encoder = enc.Spec()
	dec, ok := m.cfg.Decoder.(layers.Describer)
	if !ok {
		return s, fmt.Errorf("the decoder (%T) does not implement layers.Describer", m.cfg.Decoder)
	}
	s.Decoder = dec.Spec()
	if s.Likelihood, ok = losses.DescribeLikelihood(m.cfg.Likelihood); !ok {
		return s, fmt.Errorf("the likelihood (%T) is not a built-in one", m.cfg.Likelihood)
	}
	if s.Prior, ok = priors.Describe(m.cfg.Prior); !ok {
		return s, fmt.Errorf("the prior (%T) is not a built-in one", m.cfg.Prior)
	}
	return s, nil
}

// Save writes the model to path atomically: it writes a temporary file in
// the same folder and renames it over path, so a failure at any point
// leaves the previous file at path intact.
//
// Checkpoints are safetensors files (an open format: an 8-byte little-endian
// header length, a JSON header, then the raw little-endian tensors). Each
// parameter is one tensor named by its Param.Name, for example
// "encoder.0.weight" (shape (in, out), applied as x @ W + b),
// "encoder.0.bias" (shape (1, out)), "head.mean.weight",
// "head.logvar.weight", "decoder.1.weight", "prior.means"; F32 for float32
// models and F64 for float64 ones. Any program that reads safetensors can
// read the weights.
//
// The header's "__metadata__" holds, as strings:
//
//	lowerbound.format   "1"
//	lowerbound.model    JSON: input shape, classes, dtype and the specs of
//	                    encoder, head, decoder, likelihood and prior
//	anything set with Model.SetExtra, under its own key
//
// Load rebuilds the model from lowerbound.model alone, so it needs no code
// beyond the SDK when every part is a built-in one.
//
// A model with a user-written part (a layer without layers.Describer, or a
// likelihood or prior that is not built in) is saved with its weights and
// without the model description; read it back with LoadWeights into a model
// built the same way.
func (m *Model) Save(path string) error {
	meta := map[string]string{metaFormat: formatV1}
	if spec, err := m.spec(); err == nil {
		b, err := json.Marshal(spec)
		if err != nil {
			return fmt.Errorf("vae.Save: %w", err)
		}
		meta[metaModel] = string(b)
	}
	for k, v := range m.Extra() {
		meta[k] = v
	}
	ts := make([]safetensors.Tensor, 0, len(m.params))
	for _, p := range m.params {
		t, err := toSafetensor(p)
		if err != nil {
			return fmt.Errorf("vae.Save: %s: %w", path, err)
		}
		ts = append(ts, t)
	}
	if err := safetensors.WriteFile(path, ts, meta); err != nil {
		return fmt.Errorf("vae.Save: %w", err)
	}
	return nil
}

func toSafetensor(p *layers.Param) (safetensors.Tensor, error) {
	shape := []int(p.Value.Shape().Clone())
	switch d := p.Value.Data().(type) {
	case []float32:
		return safetensors.FromFloat32(p.Name, shape, d)
	case []float64:
		return safetensors.FromFloat64(p.Name, shape, d)
	}
	return safetensors.Tensor{}, fmt.Errorf("parameter %s: dtype %v", p.Name, p.Value.Dtype())
}

// Load reads a checkpoint written by Save and rebuilds the model from the
// description in its metadata. A truncated, corrupt or inconsistent file
// returns an error wrapping ErrCheckpoint and no model; a missing file, the
// operating system's error.
func Load(path string) (*Model, error) {
	f, err := readCheckpoint("vae.Load", path)
	if err != nil {
		return nil, err
	}
	bad := func(format string, a ...any) error {
		return fmt.Errorf("vae.Load: %s: %w: %s", path, ErrCheckpoint, fmt.Sprintf(format, a...))
	}
	if v := f.Metadata[metaFormat]; v != formatV1 {
		return nil, bad("metadata %s is %q, want %q", metaFormat, v, formatV1)
	}
	raw, ok := f.Metadata[metaModel]
	if !ok {
		return nil, bad("no model description (metadata %s); the model has user-written parts: build it in code and use LoadWeights", metaModel)
	}
	var spec modelSpec
	if err := json.Unmarshal([]byte(raw), &spec); err != nil {
		return nil, bad("metadata %s: %v", metaModel, err)
	}
	var dtype tensor.Dtype
	switch spec.Dtype {
	case tensor.Float32.String():
		dtype = tensor.Float32
	case tensor.Float64.String():
		dtype = tensor.Float64
	default:
		return nil, bad("dtype %q", spec.Dtype)
	}
	opt := layers.Options{Dtype: dtype}
	enc, err := layers.FromSpec(spec.Encoder, opt)
	if err != nil {
		return nil, bad("encoder: %v", err)
	}
	head, err := layers.NewGaussianHeadFromSpec(spec.Head, opt)
	if err != nil {
		return nil, bad("head: %v", err)
	}
	dec, err := layers.FromSpec(spec.Decoder, opt)
	if err != nil {
		return nil, bad("decoder: %v", err)
	}
	lik, err := losses.LikelihoodFromSpec(spec.Likelihood, dtype)
	if err != nil {
		return nil, bad("likelihood: %v", err)
	}
	prior, err := priors.FromSpec(spec.Prior, dtype, enc, head)
	if err != nil {
		return nil, bad("prior: %v", err)
	}
	m, err := New(Config{InputShape: spec.InputShape, Encoder: enc, Head: head, Decoder: dec, Likelihood: lik, Prior: prior, Classes: spec.Classes, Dtype: dtype})
	if err != nil {
		return nil, bad("%v", err)
	}
	if err := m.setWeights(f, path); err != nil {
		return nil, err
	}
	for k, v := range f.Metadata {
		if !strings.HasPrefix(k, reservedPrefix) {
			if m.extra == nil {
				m.extra = map[string]string{}
			}
			m.extra[k] = v
		}
	}
	return m, nil
}

// LoadWeights reads the parameters of a checkpoint into m, which must have
// been built with the same parts (same parameter names, shapes and dtype).
// It is safe to call while inference runs (it waits for running calls); it
// must not run at the same time as Train.
// It checks everything before it changes anything: on error m is as it was.
// Extra metadata in the file replaces m's.
func (m *Model) LoadWeights(path string) error {
	f, err := readCheckpoint("vae.LoadWeights", path)
	if err != nil {
		return err
	}
	if err := m.setWeights(f, path); err != nil {
		return err
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	m.extra = map[string]string{}
	for k, v := range f.Metadata {
		if !strings.HasPrefix(k, reservedPrefix) {
			m.extra[k] = v
		}
	}
	return nil
}

// readCheckpoint reads a safetensors file. A file that is not valid
// safetensors (truncated, corrupt) gives an error that wraps both
// ErrCheckpoint and the reader's own sentinel; a missing or unreadable file
// gives the operating system's error.
func readCheckpoint(where, path string) (*safetensors.File, error) {
	f, err := safetensors.ReadFile(path)
	switch {
	case err == nil:
		return f, nil
	case errors.Is(err, safetensors.ErrCorrupt):
		return nil, fmt.Errorf("%s: %w: %w", where, ErrCheckpoint, err)
	default:
		return nil, fmt.Errorf("%s: %w", where, err)
	}
}

// setWeights checks that f holds exactly m's parameters and copies them in.
func (m *Model) setWeights(f *safetensors.File, path string) error {
	bad := func(format string, a ...any) error {
		return fmt.Errorf("vae: %s: %w: %s", path, ErrCheckpoint, fmt.Sprintf(format, a...))
	}
	want := map[string]bool{}
	staged := make([]any, len(m.params))
	for i, p := range m.params {
		want[p.Name] = true
		t, err := f.Tensor(p.Name)
		if err != nil {
			return bad("tensor %q is missing", p.Name)
		}
		if !slices.Equal(t.Shape, []int(p.Value.Shape())) {
			return bad("tensor %q has shape %v, the model wants %v", p.Name, t.Shape, []int(p.Value.Shape()))
		}
		switch m.dtype {
		case tensor.Float32:
			v, err := t.Float32s()
			if err != nil {
				return bad("tensor %q: %v (the model is float32)", p.Name, err)
			}
			staged[i] = v
		default:
			v, err := t.Float64s()
			if err != nil {
				return bad("tensor %q: %v (the model is float64)", p.Name, err)
			}
			staged[i] = v
		}
	}
	for _, name := range f.Names() {
		if !want[name] {
			return bad("tensor %q is not a parameter of this model", name)
		}
	}
	// Writing the parameters excludes running inference programs.
	m.engine.Lock()
	defer m.engine.Unlock()
	for i, p := range m.params {
		switch d := p.Value.Data().(type) {
		case []float32:
			copy(d, staged[i].([]float32))
		case []float64:
			copy(d, staged[i].([]float64))
		}
	}
	return nil
}
