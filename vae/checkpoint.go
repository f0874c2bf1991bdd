package vae

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
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

// ErrNotDescribed is wrapped by the error Save and SaveTo return for a model
// with a part that a checkpoint cannot describe: a user-written layer,
// likelihood or prior that does not describe itself through
// layers.Describer (see Kinds), or a Sequential holding such a layer. Load
// could not rebuild it. Pass AllowWeightsOnly to write the file anyway; it
// is then read with LoadWeights into a model built in code.
var ErrNotDescribed = errors.New("vae: the model has a part a checkpoint cannot describe")

// Metadata keys and format versions; checkpoint_format.md documents them.
const (
	metaFormat = reservedPrefix + "format"
	metaModel  = reservedPrefix + "model"
	metaSHA256 = reservedPrefix + "sha256"
	formatV1   = "1"
	formatV2   = "2"
)

// DefaultMaxBytes is the largest checkpoint, in bytes, that Load, LoadFrom,
// LoadWeights and LoadWeightsFrom accept unless MaxBytes says otherwise
// (4 GiB).
const DefaultMaxBytes int64 = 4 << 30

// DefaultMaxFeatures is the largest record (values per record, the product
// of the input shape) and the largest class count that Load and LoadFrom
// accept from a model description unless MaxFeatures says otherwise
// (4,194,304: for example 4 x 1024 x 1024).
const DefaultMaxFeatures = 1 << 22

// SaveOption changes what Save and SaveTo write.
type SaveOption func(*saveConfig)

type saveConfig struct{ weightsOnly bool }

// AllowWeightsOnly lets Save and SaveTo write a model that has a
// user-written part: the file then holds the weights without the model
// description, and is read back with LoadWeights into a model built the
// same way in code. Without it such a model is an error wrapping
// ErrNotDescribed. A model whose parts are all built in is described
// either way.
func AllowWeightsOnly() SaveOption { return func(c *saveConfig) { c.weightsOnly = true } }

// LoadOption changes the limits of Load, LoadFrom, LoadWeights and
// LoadWeightsFrom.
type LoadOption func(*loadConfig)

type loadConfig struct {
	maxBytes    int64
	maxFeatures int
	kinds       *Kinds
}

// MaxBytes sets the largest checkpoint accepted, in bytes (default
// DefaultMaxBytes); n < 8 is treated as 8. A larger file or stream is an
// error wrapping ErrCheckpoint, raised from its header before its data are
// read.
func MaxBytes(n int64) LoadOption { return func(c *loadConfig) { c.maxBytes = max(n, 8) } }

// MaxFeatures sets the largest record size and class count that a model
// description may declare (default DefaultMaxFeatures); n < 1 is treated
// as 1. Load allocates one record of that size, beyond the file's own
// tensors, to compile the model's first program.
func MaxFeatures(n int) LoadOption { return func(c *loadConfig) { c.maxFeatures = max(n, 1) } }

func loadOptions(opts []LoadOption) loadConfig {
	c := loadConfig{maxBytes: DefaultMaxBytes, maxFeatures: DefaultMaxFeatures}
	for _, o := range opts {
		if o != nil {
			o(&c)
		}
	}
	return c
}

// spec describes the model, or says which part cannot be described. A
// user part describes itself through layers.Describer with a kind of its
// own.
func (m *Model) spec() (s modelSpec, err error) {
	s = modelSpec{InputShape: m.cfg.InputShape, Classes: m.cfg.Classes, Dtype: m.dtype.String(), Latent: m.latent, Head: m.cfg.Head.Spec()}
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
	if s.Likelihood.LikelihoodSpec, ok = losses.DescribeLikelihood(m.cfg.Likelihood); !ok {
		d, isD := m.cfg.Likelihood.(layers.Describer)
		if !isD {
			return s, fmt.Errorf("the likelihood (%T) is not a built-in one and does not implement layers.Describer", m.cfg.Likelihood)
		}
		sp := d.Spec()
		if sp.Kind == "" || builtinLikelihood(sp.Kind) {
			return s, fmt.Errorf("the likelihood (%T) describes itself with kind %q: want a non-empty kind of its own", m.cfg.Likelihood, sp.Kind)
		}
		s.Likelihood = likelihoodSpec{LikelihoodSpec: losses.LikelihoodSpec{Kind: sp.Kind}, Config: sp.Config}
	}
	if s.Prior.Spec, ok = priors.Describe(m.cfg.Prior); !ok {
		d, isD := m.cfg.Prior.(layers.Describer)
		if !isD {
			return s, fmt.Errorf("the prior (%T) is not a built-in one and does not implement layers.Describer", m.cfg.Prior)
		}
		sp := d.Spec()
		if sp.Kind == "" || builtinPrior(sp.Kind) {
			return s, fmt.Errorf("the prior (%T) describes itself with kind %q: want a non-empty kind of its own", m.cfg.Prior, sp.Kind)
		}
		s.Prior = priorSpec{Spec: priors.Spec{Kind: sp.Kind, Dim: m.cfg.Prior.Dim()}, Config: sp.Config}
	}
	ts, err := s.transforms()
	if err != nil {
		return s, err
	}
	s.Transforms = ts
	return s, nil
}

// Save writes the model to path atomically: it writes a temporary file in
// the same folder and renames it over path, so a failure at any point
// leaves the previous file at path intact. A temporary file left behind by
// a save that was killed is removed by the next Save to the same path, and
// only such files: a save in progress, in this process or another, keeps
// its own (checkpoint_format.md, section 9, says how they are told apart).
//
// The file is safetensors, with every parameter under its Param.Name, the
// model description, a SHA-256 digest of every tensor and the transforms a
// reader needs in its metadata; checkpoint_format.md in this package
// documents all of it for readers in any language. Anything set with
// Model.SetExtra is stored under its own key.
//
// User-written parts that describe themselves (layers.Describer with a
// kind of their own) are recorded like built-in ones; Load rebuilds them
// when given a Kinds that knows their kinds (WithKinds). Save refuses, with
// an error wrapping ErrNotDescribed, a model with a part that does not
// describe itself, unless AllowWeightsOnly is given. It refuses a model with a non-finite
// parameter (ErrNonFinite), naming it. Save reads the parameters under
// the lock that LoadWeights takes, so it is safe to call while inference
// and LoadWeights run; it must not run at the same time as Train.
func (m *Model) Save(path string, opts ...SaveOption) error {
	ts, meta, err := m.checkpoint("vae.Save: "+path, opts)
	if err != nil {
		return err
	}
	if err := safetensors.WriteFile(path, ts, meta); err != nil {
		return fmt.Errorf("vae.Save: %w", err)
	}
	return nil
}

// SaveTo writes the checkpoint that Save would write to w (not atomically:
// on error w may hold part of it).
func (m *Model) SaveTo(w io.Writer, opts ...SaveOption) error {
	ts, meta, err := m.checkpoint("vae.SaveTo", opts)
	if err != nil {
		return err
	}
	if err := safetensors.Write(w, ts, meta); err != nil {
		return fmt.Errorf("vae.SaveTo: %w", err)
	}
	return nil
}

// checkpoint returns the tensors and metadata of m's checkpoint.
func (m *Model) checkpoint(where string, opts []SaveOption) ([]safetensors.Tensor, map[string]string, error) {
	var cfg saveConfig
	for _, o := range opts {
		if o != nil {
			o(&cfg)
		}
	}
	ts, err := m.snapshotTensors(where)
	if err != nil {
		return nil, nil, err
	}
	meta := map[string]string{metaFormat: formatV2, metaSHA256: digests(ts)}
	spec, err := m.spec()
	if err == nil {
		// Check the description the way Load will, so that a file that
		// Load refuses is never written silently. The parameters of a
		// self-described user kind are the registry's business, at Load.
		err = checkSpec(&spec, formatV2, tensorMap(ts), limits{maxFeatures: math.MaxInt, kinds: &selfDescribed{}})
	}
	switch {
	case err == nil:
		b, err := json.Marshal(spec)
		if err != nil {
			return nil, nil, fmt.Errorf("%s: %w", where, err)
		}
		meta[metaModel] = string(b)
	case !cfg.weightsOnly:
		return nil, nil, fmt.Errorf("%s: %w: %v; Load could not rebuild it: pass vae.AllowWeightsOnly() to save the weights alone and read them with LoadWeights into a model built in code", where, ErrNotDescribed, err)
	}
	for k, v := range m.Extra() {
		meta[k] = v
	}
	return ts, meta, nil
}

// snapshotTensors copies the parameters into tensors under the engine's
// read lock (LoadWeights writes them under its write lock) and checks
// that they are finite.
func (m *Model) snapshotTensors(where string) ([]safetensors.Tensor, error) {
	m.engine.RLock()
	defer m.engine.RUnlock()
	ts := make([]safetensors.Tensor, 0, len(m.params))
	for _, p := range m.params {
		t, err := toSafetensor(p)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		if i, v, bad := firstNonFinite(t); bad {
			return nil, fmt.Errorf("%s: parameter %q element %d is %v: %w", where, p.Name, i, v, ErrNonFinite)
		}
		ts = append(ts, t)
	}
	return ts, nil
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

// digests returns the metaSHA256 value: a JSON object mapping each tensor's
// name to the lowercase hex SHA-256 (FIPS 180-4) of its data bytes.
func digests(ts []safetensors.Tensor) string {
	sums := make(map[string]string, len(ts))
	for _, t := range ts {
		s := sha256.Sum256(t.Data)
		sums[t.Name] = hex.EncodeToString(s[:])
	}
	b, _ := json.Marshal(sums) // a map of strings always marshals
	return string(b)
}

func tensorMap(ts []safetensors.Tensor) map[string]safetensors.Tensor {
	out := make(map[string]safetensors.Tensor, len(ts))
	for _, t := range ts {
		out[t.Name] = t
	}
	return out
}

// firstNonFinite returns the index and value of the first NaN or infinite
// element of an F32 or F64 tensor.
func firstNonFinite(t safetensors.Tensor) (int, float64, bool) {
	switch t.Dtype {
	case safetensors.F32:
		for i := 0; i+4 <= len(t.Data); i += 4 {
			u := uint32(t.Data[i]) | uint32(t.Data[i+1])<<8 | uint32(t.Data[i+2])<<16 | uint32(t.Data[i+3])<<24
			if v := float64(math.Float32frombits(u)); math.IsNaN(v) || math.IsInf(v, 0) {
				return i / 4, v, true
			}
		}
	case safetensors.F64:
		for i := 0; i+8 <= len(t.Data); i += 8 {
			var u uint64
			for j := 7; j >= 0; j-- {
				u = u<<8 | uint64(t.Data[i+j])
			}
			if v := math.Float64frombits(u); math.IsNaN(v) || math.IsInf(v, 0) {
				return i / 8, v, true
			}
		}
	}
	return 0, 0, false
}

// Load reads a checkpoint written by Save and rebuilds the model from the
// description in its metadata. It reads files of format 2 and of format
// 1 (written before tensor digests and transforms were recorded). Parts of
// user kinds are rebuilt by the Kinds passed with WithKinds.
//
// Before it builds anything, Load checks the whole file: the safetensors
// structure, the format version, the SHA-256 digest of every tensor, that
// every weight is finite, that the description decodes strictly (no
// unknown or repeated key) and agrees with itself (latent size, prior
// dimension, dtype, transforms) and that the parameters it implies are
// exactly the file's tensors, shape for shape. So a checkpoint never makes
// Load allocate much more than the file itself holds: its tensors, a few
// copies of them, and one record of at most MaxFeatures values. After
// building, the rebuilt model's own description must equal the file's.
//
// A truncated, corrupt or inconsistent file returns an error wrapping
// ErrCheckpoint and no model; a missing file, the operating system's
// error.
func Load(path string, opts ...LoadOption) (*Model, error) {
	cfg := loadOptions(opts)
	f, err := readCheckpointFile("vae.Load", path, cfg)
	if err != nil {
		return nil, err
	}
	return load("vae.Load: "+path, f, cfg)
}

// LoadFrom reads a checkpoint from r, which it reads to the end, and
// rebuilds the model; see Load. Memory grows with the bytes that arrive,
// never with what the header claims, and the stream may not exceed
// MaxBytes (default DefaultMaxBytes).
func LoadFrom(r io.Reader, opts ...LoadOption) (*Model, error) {
	cfg := loadOptions(opts)
	f, err := readCheckpointStream("vae.LoadFrom", r, cfg)
	if err != nil {
		return nil, err
	}
	return load("vae.LoadFrom", f, cfg)
}

func load(where string, f *safetensors.File, cfg loadConfig) (*Model, error) {
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%s: %w: %s", where, ErrCheckpoint, fmt.Sprintf(format, a...))
	}
	version, err := checkFile(f)
	if err != nil {
		return nil, bad("%v", err)
	}
	raw, ok := f.Metadata[metaModel]
	if !ok {
		return nil, bad("no model description (metadata %s): the file was saved with AllowWeightsOnly; build the model in code and use LoadWeights", metaModel)
	}
	spec, err := decodeSpec(raw)
	if err != nil {
		return nil, bad("metadata %s: %v", metaModel, err)
	}
	lim := limits{maxFeatures: cfg.maxFeatures}
	if cfg.kinds != nil {
		lim.kinds = cfg.kinds
	}
	if err := checkSpec(&spec, version, f.Tensors, lim); err != nil {
		return nil, bad("metadata %s: %v", metaModel, err)
	}
	dtype := tensor.Float32
	if spec.Dtype == tensor.Float64.String() {
		dtype = tensor.Float64
	}
	opt := layers.Options{Dtype: dtype}
	var user layers.UserKinds
	if cfg.kinds != nil {
		user = cfg.kinds
	}
	enc, err := layers.FromSpecKinds(spec.Encoder, opt, user)
	if err != nil {
		return nil, bad("encoder: %v", err)
	}
	head, err := layers.NewGaussianHeadFromSpec(spec.Head, opt)
	if err != nil {
		return nil, bad("head: %v", err)
	}
	dec, err := layers.FromSpecKinds(spec.Decoder, opt, user)
	if err != nil {
		return nil, bad("decoder: %v", err)
	}
	var lik losses.Likelihood
	if lk, ok := cfg.kinds.likelihood(spec.Likelihood.Kind); ok {
		lik, err = lk.Build(layers.Spec{Kind: spec.Likelihood.Kind, Config: spec.Likelihood.Config}, dtype)
		if err == nil && lik == nil {
			err = errors.New("the builder returned no likelihood")
		}
	} else {
		lik, err = losses.LikelihoodFromSpec(spec.Likelihood.LikelihoodSpec, dtype)
	}
	if err != nil {
		return nil, bad("likelihood: %v", err)
	}
	var prior priors.Prior
	if pk, ok := cfg.kinds.prior(spec.Prior.Kind); ok {
		prior, err = pk.Build(layers.Spec{Kind: spec.Prior.Kind, Config: spec.Prior.Config}, dtype, enc, head)
		if err == nil && prior == nil {
			err = errors.New("the builder returned no prior")
		}
	} else {
		prior, err = priors.FromSpec(spec.Prior.Spec, dtype, enc, head)
	}
	if err != nil {
		return nil, bad("prior: %v", err)
	}
	m, err := New(Config{InputShape: spec.InputShape, Encoder: enc, Head: head, Decoder: dec, Likelihood: lik, Prior: prior, Classes: spec.Classes, Dtype: dtype})
	if err != nil {
		return nil, bad("%v", err)
	}
	// The rebuilt model must describe itself exactly as the file does:
	// this catches every field that the builders filled in or ignored.
	again, err := m.spec()
	if err != nil {
		return nil, bad("%v", err)
	}
	if version == formatV1 {
		again.Transforms = nil
	}
	a, err1 := canonical(spec)
	b, err2 := canonical(again)
	if err := errors.Join(err1, err2); err != nil {
		return nil, bad("%v", err)
	}
	if a != b {
		return nil, bad("metadata %s: %v: the file says %s, the model built from it %s", metaModel, errSpecMismatch, a, b)
	}
	if err := m.setWeights(f, where); err != nil {
		return nil, err
	}
	m.extra = extraOf(f)
	return m, nil
}

func extraOf(f *safetensors.File) map[string]string {
	out := map[string]string{}
	for k, v := range f.Metadata {
		if !strings.HasPrefix(k, reservedPrefix) {
			out[k] = v
		}
	}
	return out
}

// LoadWeights reads the parameters of a checkpoint into m, which must have
// been built with the same parts (same parameter names, shapes and dtype).
// It verifies the file as Load does (structure, format, digests, finite
// weights) and needs no model description. It is safe to call while
// inference and Save run (it waits for running calls); it must not run at
// the same time as Train.
// It checks everything before it changes anything: on error m is as it was.
// Extra metadata in the file replaces m's.
func (m *Model) LoadWeights(path string, opts ...LoadOption) error {
	cfg := loadOptions(opts)
	f, err := readCheckpointFile("vae.LoadWeights", path, cfg)
	if err != nil {
		return err
	}
	return m.loadWeights("vae.LoadWeights: "+path, f)
}

// LoadWeightsFrom reads the parameters of a checkpoint from r, which it
// reads to the end, into m; see LoadWeights and LoadFrom.
func (m *Model) LoadWeightsFrom(r io.Reader, opts ...LoadOption) error {
	cfg := loadOptions(opts)
	f, err := readCheckpointStream("vae.LoadWeightsFrom", r, cfg)
	if err != nil {
		return err
	}
	return m.loadWeights("vae.LoadWeightsFrom", f)
}

func (m *Model) loadWeights(where string, f *safetensors.File) error {
	if _, err := checkFile(f); err != nil {
		return fmt.Errorf("%s: %w: %v", where, ErrCheckpoint, err)
	}
	if err := m.setWeights(f, where); err != nil {
		return err
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	m.extra = extraOf(f)
	return nil
}

// checkFile checks what every checkpoint must satisfy, whatever reads it:
// a known format version, no unknown reserved key, the digest of every
// tensor (format 2) and finite F32 or F64 tensors. It returns the version.
func checkFile(f *safetensors.File) (string, error) {
	version := f.Metadata[metaFormat]
	known := map[string]bool{metaFormat: true, metaModel: true}
	switch version {
	case formatV1:
	case formatV2:
		known[metaSHA256] = true
		raw, ok := f.Metadata[metaSHA256]
		if !ok {
			return "", fmt.Errorf("no tensor digests (metadata %s)", metaSHA256)
		}
		var sums map[string]string
		if err := checkNoDuplicateKeys([]byte(raw)); err != nil {
			return "", fmt.Errorf("metadata %s: %v", metaSHA256, err)
		}
		if err := json.Unmarshal([]byte(raw), &sums); err != nil || sums == nil {
			return "", fmt.Errorf("metadata %s: not a JSON object of strings: %v", metaSHA256, err)
		}
		for _, name := range f.Names() {
			want, ok := sums[name]
			if !ok {
				return "", fmt.Errorf("tensor %q has no digest in metadata %s", name, metaSHA256)
			}
			got := sha256.Sum256(f.Tensors[name].Data)
			if hex.EncodeToString(got[:]) != want {
				return "", fmt.Errorf("tensor %q: SHA-256 of its data is %x, metadata %s says %q: the data or the digest is damaged", name, got, metaSHA256, want)
			}
		}
		if len(sums) != len(f.Tensors) {
			for name := range sums {
				if _, ok := f.Tensors[name]; !ok {
					return "", fmt.Errorf("metadata %s has a digest for %q, which is not a tensor of the file", metaSHA256, name)
				}
			}
		}
	default:
		return "", fmt.Errorf("metadata %s is %q, want %q or %q", metaFormat, version, formatV2, formatV1)
	}
	for k := range f.Metadata {
		if strings.HasPrefix(k, reservedPrefix) && !known[k] {
			return "", fmt.Errorf("unknown reserved metadata key %q in a format %s file", k, version)
		}
	}
	for _, name := range f.Names() {
		t := f.Tensors[name]
		if t.Dtype != safetensors.F32 && t.Dtype != safetensors.F64 {
			return "", fmt.Errorf("tensor %q is %s, want F32 or F64", name, t.Dtype)
		}
		if i, v, bad := firstNonFinite(t); bad {
			return "", fmt.Errorf("tensor %q element %d is %v: weights must be finite", name, i, v)
		}
	}
	return version, nil
}

// readCheckpointFile reads a safetensors file. A file that is not valid
// safetensors (truncated, corrupt) or is larger than cfg.maxBytes gives an
// error that wraps ErrCheckpoint (and the reader's own sentinel); a missing
// or unreadable file gives the operating system's error.
func readCheckpointFile(where, path string, cfg loadConfig) (*safetensors.File, error) {
	if fi, err := os.Stat(path); err == nil && fi.Mode().IsRegular() && fi.Size() > cfg.maxBytes {
		return nil, fmt.Errorf("%s: %s: %w: %d bytes, over the limit of %d (see vae.MaxBytes)", where, path, ErrCheckpoint, fi.Size(), cfg.maxBytes)
	}
	return wrapRead(where, func() (*safetensors.File, error) { return safetensors.ReadFile(path) })
}

func readCheckpointStream(where string, r io.Reader, cfg loadConfig) (*safetensors.File, error) {
	if r == nil {
		return nil, fmt.Errorf("%s: r: nil reader: %w", where, layers.ErrInvalidArgument)
	}
	return wrapRead(where, func() (*safetensors.File, error) { return safetensors.ReadStream(r, cfg.maxBytes) })
}

func wrapRead(where string, read func() (*safetensors.File, error)) (*safetensors.File, error) {
	f, err := read()
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
func (m *Model) setWeights(f *safetensors.File, where string) error {
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%s: %w: %s", where, ErrCheckpoint, fmt.Sprintf(format, a...))
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
	// Writing the parameters excludes running inference programs and Save.
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
