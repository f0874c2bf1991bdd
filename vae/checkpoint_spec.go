package vae

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/bits"
	"reflect"
	"slices"
	"strings"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// modelSpec is the model description stored under metaModel. See
// checkpoint_format.md for every field.
type modelSpec struct {
	InputShape []int          `json:"input_shape"`
	Classes    int            `json:"classes,omitempty"`
	Dtype      string         `json:"dtype"`
	Latent     int            `json:"latent"`
	Encoder    layers.Spec    `json:"encoder"`
	Head       layers.Spec    `json:"head"`
	Decoder    layers.Spec    `json:"decoder"`
	Likelihood likelihoodSpec `json:"likelihood"`
	Prior      priorSpec      `json:"prior"`
	// Transforms lists every map from stored numbers to the quantities
	// the model computes with (format 2 on; absent in format 1).
	Transforms []transformSpec `json:"transforms,omitempty"`
}

// likelihoodSpec is a built-in likelihood's spec, or a user likelihood's
// kind with its Config.
type likelihoodSpec struct {
	losses.LikelihoodSpec
	Config json.RawMessage `json:"config,omitempty"`
}

// priorSpec is a built-in prior's spec, or a user prior's kind and Dim
// with its Config.
type priorSpec struct {
	priors.Spec
	Config json.RawMessage `json:"config,omitempty"`
}

// transformSpec records one map that a reader must apply to recompute the
// model's numbers. Op is one of the op constants; Lo and Hi are its
// bounds (soft_clamp: both; softplus_floor: Lo only; others: none).
type transformSpec struct {
	Target string   `json:"target"`
	Op     string   `json:"op"`
	Lo     *float64 `json:"lo,omitempty"`
	Hi     *float64 `json:"hi,omitempty"`
	Result string   `json:"result"`
}

// The transform ops (see checkpoint_format.md for their formulas).
const (
	opSoftClamp     = "soft_clamp"     // y = x + softplus(lo - x) - softplus(x - hi)
	opSoftplusFloor = "softplus_floor" // y = lo + softplus(x - lo)
	opExp           = "exp"            // y = exp(x)
	opSoftmax       = "softmax"        // y_k = exp(x_k) / sum_j exp(x_j), over the last axis
	opSigmoid       = "sigmoid"        // y = 1 / (1 + exp(-x))
)

func ptr(v float64) *float64 { return &v }

// transforms returns the transforms that the model described by s applies.
// It depends only on the kinds and names in s and on the SDK's constants,
// so Load can compare a file's list with it.
func (s *modelSpec) transforms() ([]transformSpec, error) {
	var head struct {
		Name   string `json:"name"`
		In     int    `json:"in"`
		Latent int    `json:"latent"`
	}
	if err := json.Unmarshal(s.Head.Config, &head); err != nil {
		return nil, fmt.Errorf("head config: %v", err)
	}
	ts := []transformSpec{{
		Target: head.Name + ".logvar", Op: opSoftClamp, Lo: ptr(layers.LogVarMin), Hi: ptr(layers.LogVarMax),
		Result: "log-variance of q(z|x)",
	}}
	switch s.Likelihood.Kind {
	case losses.KindBernoulli:
		ts = append(ts, transformSpec{Target: "decoder", Op: opSigmoid, Result: "Bernoulli mean of p(x|z)"})
	case losses.KindLearnedGaussian:
		ts = append(ts, transformSpec{Target: s.Likelihood.Name + ".log_sigma", Op: opSoftplusFloor, Lo: ptr(losses.MinLogSigma),
			Result: "log standard deviation of p(x|z)"})
	case losses.KindColumns:
		if columnsLearnSigma(s.Likelihood.Columns) {
			ts = append(ts, transformSpec{Target: s.Likelihood.Name + ".log_sigma", Op: opSoftplusFloor, Lo: ptr(losses.MinLogSigma),
				Result: "log standard deviation of the real and positive columns of p(x|z)"})
		}
	}
	switch s.Prior.Kind {
	case priors.KindDiagonal:
		ts = append(ts, transformSpec{Target: s.Prior.Name + ".logvar", Op: opExp, Result: "variance of p(z)"})
	case priors.KindMixture:
		ts = append(ts,
			transformSpec{Target: s.Prior.Name + ".logits", Op: opSoftmax, Result: "component weights of p(z)"},
			transformSpec{Target: s.Prior.Name + ".logvars", Op: opExp, Result: "component variances of p(z)"})
	}
	return ts, nil
}

// decodeSpec decodes a model description strictly: one JSON object, no
// duplicate keys at any depth, no unknown fields, nothing after it.
func decodeSpec(raw string) (modelSpec, error) {
	var s modelSpec
	if err := checkNoDuplicateKeys([]byte(raw)); err != nil {
		return s, err
	}
	dec := json.NewDecoder(strings.NewReader(raw))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&s); err != nil {
		return s, err
	}
	if _, err := dec.Token(); err != io.EOF {
		return s, fmt.Errorf("data after the description at byte %d", dec.InputOffset())
	}
	return s, nil
}

// checkNoDuplicateKeys walks the JSON value in b and reports the first
// object key that appears twice in the same object. encoding/json keeps
// the last of two equal keys silently, so a description could otherwise
// say two things at once.
func checkNoDuplicateKeys(b []byte) error {
	dec := json.NewDecoder(bytes.NewReader(b))
	dec.UseNumber()
	type frame struct {
		keys  map[string]bool
		isObj bool
		atKey bool
	}
	var stack []frame
	for {
		off := dec.InputOffset()
		tok, err := dec.Token()
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return err
		}
		if n := len(stack); n > 0 && stack[n-1].isObj {
			top := &stack[n-1]
			if top.atKey {
				if k, ok := tok.(string); ok {
					if top.keys[k] {
						return fmt.Errorf("duplicate key %q at byte %d", k, off)
					}
					top.keys[k] = true
					top.atKey = false
					continue
				}
			} else {
				top.atKey = true // this token is the value (or starts it)
			}
		}
		switch tok {
		case json.Delim('{'):
			stack = append(stack, frame{keys: map[string]bool{}, isObj: true, atKey: true})
		case json.Delim('['):
			stack = append(stack, frame{})
		case json.Delim('}'), json.Delim(']'):
			stack = stack[:len(stack)-1]
		}
	}
}

// canonical returns v as JSON with object keys sorted at every depth, so
// that two descriptions compare equal exactly when they say the same.
func canonical(v any) (string, error) {
	b, err := json.Marshal(v)
	if err != nil {
		return "", err
	}
	var generic any
	dec := json.NewDecoder(bytes.NewReader(b))
	dec.UseNumber()
	if err := dec.Decode(&generic); err != nil {
		return "", err
	}
	out, err := json.Marshal(generic)
	return string(out), err
}

// limits bounds what a description may ask Load to allocate beyond the
// file's own tensors.
type limits struct {
	maxFeatures int
	// kinds resolves kinds that are not built in; nil knows none.
	kinds userKinds
}

// product returns the product of dims, or false if it overflows int or a
// dimension is below 1.
func product(dims []int) (int, bool) {
	n := uint64(1)
	for _, d := range dims {
		if d < 1 {
			return 0, false
		}
		hi, lo := bits.Mul64(n, uint64(d))
		if hi != 0 || lo > math.MaxInt {
			return 0, false
		}
		n = lo
	}
	return int(n), true
}

// checkSpec checks a decoded description against itself and against the
// tensors of the file (name, shape), before anything is built: every
// parameter the description implies must be a tensor of exactly that
// shape, and every tensor such a parameter. Building the model then
// allocates no more than the tensors hold, plus one record of input
// (bounded by lim.maxFeatures) to compile the first program.
// format is the file's format version.
func checkSpec(s *modelSpec, format string, tensors map[string]safetensors.Tensor, lim limits) error {
	switch s.Dtype {
	case "float32", "float64":
	default:
		return fmt.Errorf("dtype %q, want float32 or float64", s.Dtype)
	}
	wantDtype := map[string]string{"float32": safetensors.F32, "float64": safetensors.F64}[s.Dtype]
	for _, name := range sortedNames(tensors) {
		if d := tensors[name].Dtype; d != wantDtype {
			return fmt.Errorf("tensor %q is %s, the description says %s", name, d, s.Dtype)
		}
	}
	if n := len(s.InputShape); n != 1 && n != 3 {
		return fmt.Errorf("input_shape %v, want {F} or {C, H, W}", s.InputShape)
	}
	f, ok := product(s.InputShape)
	if !ok || f > lim.maxFeatures {
		return fmt.Errorf("input_shape %v: want dimensions >= 1 and at most %d values per record (see vae.MaxFeatures)", s.InputShape, lim.maxFeatures)
	}
	// The encoder input of one record: F values and the label, as
	// Classes values (flat records) or Classes planes of H x W (images).
	label := []int{max(s.Classes, 1)}
	if len(s.InputShape) == 3 {
		label = append(label, s.InputShape[1], s.InputShape[2])
	}
	lv, ok := product(label)
	if s.Classes < 0 || !ok || s.Classes > 0 && lv > lim.maxFeatures-f {
		return fmt.Errorf("classes %d: want 0, or a label that with the %d values of a record fits in %d values per record (see vae.MaxFeatures)", s.Classes, f, lim.maxFeatures)
	}
	if s.Latent < 1 {
		return fmt.Errorf("latent %d, want >= 1", s.Latent)
	}
	if s.Prior.Dim != s.Latent {
		return fmt.Errorf("prior dim %d differs from latent %d", s.Prior.Dim, s.Latent)
	}
	if s.Likelihood.Kind == losses.KindLearnedGaussian && s.Likelihood.Features != f {
		return fmt.Errorf("likelihood features %d differ from the %d values per record of input_shape %v", s.Likelihood.Features, f, s.InputShape)
	}
	if s.Likelihood.Kind == losses.KindColumns {
		if len(s.InputShape) != 1 || s.Likelihood.Features != f || len(s.Likelihood.Columns) != f {
			return fmt.Errorf("likelihood columns: features %d and %d columns listed, want both equal to the %d values per record of a flat input_shape %v",
				s.Likelihood.Features, len(s.Likelihood.Columns), f, s.InputShape)
		}
		outs := 0
		for _, c := range s.Likelihood.Columns {
			if c.Categories < 0 || c.Categories > lim.maxFeatures-outs {
				return fmt.Errorf("likelihood columns: more than %d decoder outputs per record (see vae.MaxFeatures)", lim.maxFeatures)
			}
			outs += max(c.Categories, 1)
		}
		if _, err := losses.NewColumns(s.Likelihood.Name, s.Likelihood.Columns, tensor.Float64); err != nil {
			return fmt.Errorf("likelihood columns: %v", err)
		}
	} else if s.Likelihood.Columns != nil {
		return fmt.Errorf("likelihood kind %q lists columns; only %q does", s.Likelihood.Kind, losses.KindColumns)
	}
	switch format {
	case formatV1:
		if s.Transforms != nil {
			return fmt.Errorf("transforms in a format %s file", formatV1)
		}
	default:
		want, err := s.transforms()
		if err != nil {
			return err
		}
		if !reflect.DeepEqual(s.Transforms, want) {
			a, _ := json.Marshal(s.Transforms)
			b, _ := json.Marshal(want)
			return fmt.Errorf("transforms %s, this SDK computes %s", a, b)
		}
	}

	want, err := impliedParams(s, lim.kinds)
	if err != nil {
		if errors.Is(err, layers.ErrUnknownKind) || errors.Is(err, losses.ErrUnknownLikelihood) || errors.Is(err, priors.ErrUnknownKind) {
			return fmt.Errorf("%w: %v", errUnregistered, err)
		}
		return err
	}
	seen := make(map[string]bool, len(want))
	for _, p := range want {
		seen[p.Name] = true
	}
	for _, p := range want {
		t, ok := tensors[p.Name]
		if !ok {
			return fmt.Errorf("the description implies parameter %q of shape %v; the file has no such tensor", p.Name, p.Shape)
		}
		if !slices.Equal(t.Shape, p.Shape) {
			return fmt.Errorf("tensor %q has shape %v, the description implies %v", p.Name, t.Shape, p.Shape)
		}
	}
	// At Save, the parameters of self-described user kinds are unknown:
	// tensors that no built-in part implies are theirs.
	lenient := false
	if sd, ok := lim.kinds.(*selfDescribed); ok {
		lenient = sd.used
	}
	if len(want) != len(tensors) && !lenient {
		for _, name := range sortedNames(tensors) {
			if !seen[name] {
				return fmt.Errorf("tensor %q is not a parameter of the described model", name)
			}
		}
	}
	return nil
}

// impliedParams returns the parameters (names and shapes) that the model
// described by s has, in the model's order, without building anything.
func impliedParams(s *modelSpec, kinds userKinds) ([]layers.ParamShape, error) {
	var user layers.UserKinds
	if kinds != nil {
		user = kinds
	}
	// The parameters the description implies, part by part, in the
	// model's order; a name repeated within a part is one shared parameter.
	var want []layers.ParamShape
	seen := map[string][]int{}
	add := func(part string, ps []layers.ParamShape) error {
		local := map[string]bool{}
		for _, p := range ps {
			if shape, dup := seen[p.Name]; dup {
				if local[p.Name] && slices.Equal(shape, p.Shape) {
					continue
				}
				return fmt.Errorf("%s: parameter %q appears twice", part, p.Name)
			}
			seen[p.Name], local[p.Name] = p.Shape, true
			want = append(want, p)
		}
		return nil
	}
	for _, part := range []struct {
		name string
		spec layers.Spec
	}{{"encoder", s.Encoder}, {"head", s.Head}, {"decoder", s.Decoder}} {
		if part.name == "head" && part.spec.Kind != "gaussian_head" {
			return nil, fmt.Errorf("head kind %q, want %q", part.spec.Kind, "gaussian_head")
		}
		ps, err := layers.ParamShapesKinds(part.spec, user)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", part.name, err)
		}
		if part.name == "head" {
			// mean.weight is (in, latent).
			if len(ps) != 4 || ps[0].Shape[1] != s.Latent {
				return nil, fmt.Errorf("head latent size differs from latent %d", s.Latent)
			}
		}
		if err := add(part.name, ps); err != nil {
			return nil, err
		}
	}
	lik, err := likelihoodShapes(s.Likelihood, kinds)
	if err != nil {
		return nil, err
	}
	if err := add("likelihood", lik); err != nil {
		return nil, err
	}
	pri, err := priorShapes(s.Prior, kinds)
	if err != nil {
		return nil, err
	}
	if err := add("prior", pri); err != nil {
		return nil, err
	}
	return want, nil
}

// likelihoodShapes returns the parameters a built-in likelihood has; the
// names follow losses.NewLearnedGaussian.
func likelihoodShapes(s likelihoodSpec, kinds userKinds) ([]layers.ParamShape, error) {
	if !builtinLikelihood(s.Kind) && kinds != nil {
		ps, ok, err := kinds.likelihoodParams(layers.Spec{Kind: s.Kind, Config: s.Config})
		if ok {
			if err != nil {
				return nil, fmt.Errorf("likelihood kind %q: %w", s.Kind, err)
			}
			return ps, nil
		}
	}
	switch s.Kind {
	case losses.KindBernoulli, losses.KindGaussian:
		return nil, nil
	case losses.KindLearnedGaussian:
		return []layers.ParamShape{{Name: s.Name + ".log_sigma", Shape: []int{1, s.Features}}}, nil
	case losses.KindColumns:
		if columnsLearnSigma(s.Columns) {
			return []layers.ParamShape{{Name: s.Name + ".log_sigma", Shape: []int{1, len(s.Columns)}}}, nil
		}
		return nil, nil
	}
	return nil, fmt.Errorf("likelihood kind %q: %w", s.Kind, losses.ErrUnknownLikelihood)
}

// priorShapes returns the parameters a built-in prior has; the names
// follow the constructors in package priors.
func priorShapes(s priorSpec, kinds userKinds) ([]layers.ParamShape, error) {
	if !builtinPrior(s.Kind) && kinds != nil {
		ps, ok, err := kinds.priorParams(layers.Spec{Kind: s.Kind, Config: s.Config})
		if ok {
			if err != nil {
				return nil, fmt.Errorf("prior kind %q: %w", s.Kind, err)
			}
			return ps, nil
		}
	}
	switch s.Kind {
	case priors.KindStandardNormal:
		return nil, nil
	case priors.KindDiagonal:
		return []layers.ParamShape{{Name: s.Name + ".mean", Shape: []int{1, s.Dim}}, {Name: s.Name + ".logvar", Shape: []int{1, s.Dim}}}, nil
	case priors.KindMixture:
		return []layers.ParamShape{
			{Name: s.Name + ".logits", Shape: []int{1, s.Components}},
			{Name: s.Name + ".means", Shape: []int{s.Components, s.Dim}},
			{Name: s.Name + ".logvars", Shape: []int{s.Components, s.Dim}},
		}, nil
	case priors.KindVamp:
		f, ok := product(s.InputShape)
		if !ok {
			return nil, fmt.Errorf("prior input_shape %v", s.InputShape)
		}
		return []layers.ParamShape{{Name: s.Name + ".pseudo_inputs", Shape: []int{s.Components, f}}}, nil
	}
	return nil, fmt.Errorf("prior kind %q: %w", s.Kind, priors.ErrUnknownKind)
}

func sortedNames(m map[string]safetensors.Tensor) []string {
	names := make([]string, 0, len(m))
	for n := range m {
		names = append(names, n)
	}
	slices.Sort(names)
	return names
}

// errSpecMismatch reports a description that decodes and builds but does
// not say what the rebuilt model says.
var errSpecMismatch = errors.New("the description differs from the model it builds")

// columnsLearnSigma reports whether a column learns its sigma: then the
// columns likelihood has its log sigma parameter.
func columnsLearnSigma(cols []losses.Column) bool {
	for _, c := range cols {
		if c.LearnSigma {
			return true
		}
	}
	return false
}
