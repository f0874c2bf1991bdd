package vae

import (
	"errors"
	"fmt"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// Kinds is a registry of the kinds of a user's own parts, so that Load can
// rebuild a model that has them. The caller builds it, adds its kinds and
// passes it to Load or LoadFrom with WithKinds; the SDK has no global
// registry. Register kinds before sharing the value; lookups are then safe
// for concurrent use.
//
// A user part takes part in checkpoints by describing itself: a layer, a
// likelihood or a prior implements layers.Describer, whose Spec returns a
// kind of its own (not a built-in one) and its configuration as JSON. Save
// then records that Spec in the model description, and Load, given a Kinds
// that knows the kind, first checks the parameters the kind's Params
// function reports against the file's tensors and only then calls Build.
// So a registered kind keeps the promise that a checkpoint cannot make Load
// allocate more than its tensors hold, as long as its Params and Build
// agree and Build validates its configuration.
type Kinds struct {
	layers      map[string]LayerKind
	likelihoods map[string]LikelihoodKind
	priors      map[string]PriorKind
}

// LayerKind rebuilds the user layers of one kind.
type LayerKind struct {
	// Params returns the names and shapes of the parameters of the layer
	// spec describes, in the order of its Params method, without creating
	// them.
	Params func(spec layers.Spec) ([]layers.ParamShape, error)
	// Build returns the layer, with parameters of those names and shapes
	// in opt.Dtype (their values are then read from the checkpoint).
	Build func(spec layers.Spec, opt layers.Options) (layers.Layer, error)
}

// LikelihoodKind rebuilds the user likelihoods of one kind; see LayerKind.
type LikelihoodKind struct {
	Params func(spec layers.Spec) ([]layers.ParamShape, error)
	Build  func(spec layers.Spec, dtype tensor.Dtype) (losses.Likelihood, error)
}

// PriorKind rebuilds the user priors of one kind; see LayerKind. Build gets
// the model's rebuilt encoder and head, as a VampPrior needs them.
type PriorKind struct {
	Params func(spec layers.Spec) ([]layers.ParamShape, error)
	Build  func(spec layers.Spec, dtype tensor.Dtype, encoder layers.Layer, head *layers.GaussianHead) (priors.Prior, error)
}

func kindError(where, kind, format string, a ...any) error {
	return fmt.Errorf("%s: kind %q: %s: %w", where, kind, fmt.Sprintf(format, a...), layers.ErrInvalidArgument)
}

// AddLayer registers a layer kind. The kind must be non-empty, not a
// built-in layer kind and not registered yet; both functions are required.
func (k *Kinds) AddLayer(kind string, lk LayerKind) error {
	const where = "vae.Kinds.AddLayer"
	switch {
	case kind == "":
		return kindError(where, kind, "empty")
	case layers.BuiltinKind(kind):
		return kindError(where, kind, "a built-in layer kind")
	case lk.Params == nil || lk.Build == nil:
		return kindError(where, kind, "Params and Build are both required")
	}
	if _, dup := k.layers[kind]; dup {
		return kindError(where, kind, "already registered")
	}
	if k.layers == nil {
		k.layers = map[string]LayerKind{}
	}
	k.layers[kind] = lk
	return nil
}

func builtinLikelihood(kind string) bool {
	switch kind {
	case losses.KindBernoulli, losses.KindGaussian, losses.KindLearnedGaussian, losses.KindColumns:
		return true
	}
	return false
}

func builtinPrior(kind string) bool {
	switch kind {
	case priors.KindStandardNormal, priors.KindDiagonal, priors.KindMixture, priors.KindVamp:
		return true
	}
	return false
}

// AddLikelihood registers a likelihood kind; see AddLayer.
func (k *Kinds) AddLikelihood(kind string, lk LikelihoodKind) error {
	const where = "vae.Kinds.AddLikelihood"
	switch {
	case kind == "":
		return kindError(where, kind, "empty")
	case builtinLikelihood(kind):
		return kindError(where, kind, "a built-in likelihood kind")
	case lk.Params == nil || lk.Build == nil:
		return kindError(where, kind, "Params and Build are both required")
	}
	if _, dup := k.likelihoods[kind]; dup {
		return kindError(where, kind, "already registered")
	}
	if k.likelihoods == nil {
		k.likelihoods = map[string]LikelihoodKind{}
	}
	k.likelihoods[kind] = lk
	return nil
}

// AddPrior registers a prior kind; see AddLayer.
func (k *Kinds) AddPrior(kind string, pk PriorKind) error {
	const where = "vae.Kinds.AddPrior"
	switch {
	case kind == "":
		return kindError(where, kind, "empty")
	case builtinPrior(kind):
		return kindError(where, kind, "a built-in prior kind")
	case pk.Params == nil || pk.Build == nil:
		return kindError(where, kind, "Params and Build are both required")
	}
	if _, dup := k.priors[kind]; dup {
		return kindError(where, kind, "already registered")
	}
	if k.priors == nil {
		k.priors = map[string]PriorKind{}
	}
	k.priors[kind] = pk
	return nil
}

// WithKinds lets Load and LoadFrom rebuild the user kinds registered in k.
func WithKinds(k *Kinds) LoadOption { return func(c *loadConfig) { c.kinds = k } }

// LayerParams implements layers.UserKinds.
func (k *Kinds) LayerParams(spec layers.Spec) ([]layers.ParamShape, bool, error) {
	lk, ok := k.layer(spec.Kind)
	if !ok {
		return nil, false, nil
	}
	ps, err := lk.Params(spec)
	return ps, true, err
}

// BuildLayer implements layers.UserKinds.
func (k *Kinds) BuildLayer(spec layers.Spec, opt layers.Options) (layers.Layer, bool, error) {
	lk, ok := k.layer(spec.Kind)
	if !ok {
		return nil, false, nil
	}
	l, err := lk.Build(spec, opt)
	return l, true, err
}

func (k *Kinds) layer(kind string) (LayerKind, bool) {
	if k == nil {
		return LayerKind{}, false
	}
	lk, ok := k.layers[kind]
	return lk, ok
}

// errUnregistered reports a user kind that the Kinds given to Load (if
// any) does not know.
var errUnregistered = errors.New("not a built-in kind and not registered: register it in a vae.Kinds and pass vae.WithKinds")

// userKinds is what checkSpec consults for kinds that are not built in:
// at Load the caller's registry, at Save a stand-in that accepts any
// self-described kind (Save cannot know the reader's registry).
type userKinds interface {
	layers.UserKinds
	likelihoodParams(spec layers.Spec) ([]layers.ParamShape, bool, error)
	priorParams(spec layers.Spec) ([]layers.ParamShape, bool, error)
}

func (k *Kinds) likelihoodParams(spec layers.Spec) ([]layers.ParamShape, bool, error) {
	if k == nil {
		return nil, false, nil
	}
	lk, ok := k.likelihoods[spec.Kind]
	if !ok {
		return nil, false, nil
	}
	ps, err := lk.Params(spec)
	return ps, true, err
}

func (k *Kinds) priorParams(spec layers.Spec) ([]layers.ParamShape, bool, error) {
	if k == nil {
		return nil, false, nil
	}
	pk, ok := k.priors[spec.Kind]
	if !ok {
		return nil, false, nil
	}
	ps, err := pk.Params(spec)
	return ps, true, err
}

// selfDescribed is the Save-time stand-in: every non-empty kind that is
// not built in is accepted, with its parameters unknown; used records
// that one was.
type selfDescribed struct{ used bool }

func (d *selfDescribed) accept(kind string) ([]layers.ParamShape, bool, error) {
	if kind == "" {
		return nil, false, nil
	}
	d.used = true
	return nil, true, nil
}

func (d *selfDescribed) LayerParams(spec layers.Spec) ([]layers.ParamShape, bool, error) {
	return d.accept(spec.Kind)
}

func (*selfDescribed) BuildLayer(layers.Spec, layers.Options) (layers.Layer, bool, error) {
	return nil, false, nil
}

func (d *selfDescribed) likelihoodParams(spec layers.Spec) ([]layers.ParamShape, bool, error) {
	return d.accept(spec.Kind)
}

func (d *selfDescribed) priorParams(spec layers.Spec) ([]layers.ParamShape, bool, error) {
	return d.accept(spec.Kind)
}

func (k *Kinds) likelihood(kind string) (LikelihoodKind, bool) {
	if k == nil || builtinLikelihood(kind) {
		return LikelihoodKind{}, false
	}
	lk, ok := k.likelihoods[kind]
	return lk, ok
}

func (k *Kinds) prior(kind string) (PriorKind, bool) {
	if k == nil || builtinPrior(kind) {
		return PriorKind{}, false
	}
	pk, ok := k.priors[kind]
	return pk, ok
}
