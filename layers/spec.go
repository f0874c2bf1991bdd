package layers

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
)

// ErrUnknownKind is wrapped by FromSpec when a Spec's Kind names no built-in
// layer.
var ErrUnknownKind = errors.New("unknown layer kind")

// The Kind of each built-in layer's Spec.
const (
	kindDense        = "dense"
	kindMLP          = "mlp"
	kindConv2D       = "conv2d"
	kindUpsample     = "upsample"
	kindFlatten      = "flatten"
	kindReshape      = "reshape"
	kindActivation   = "activation"
	kindSequential   = "sequential"
	kindGaussianHead = "gaussian_head"
)

// FromSpec rebuilds a built-in layer from its Spec: Dense, MLP, Conv2D,
// Upsample, Flatten, Reshape, Activation, or a Sequential of these (nested to
// any depth). The result has the same parameter names and shapes as the
// layer that wrote the Spec, with fresh values initialised by opt; the
// caller then overwrites them from a checkpoint. opt.Dtype chooses the
// dtype, which a Spec does not record.
//
// A Kind that names no built-in layer gives an error wrapping
// ErrUnknownKind; a malformed or invalid config gives one wrapping
// ErrInvalidArgument.
func FromSpec(spec Spec, opt Options) (Layer, error) {
	return fromSpec("layers.FromSpec", spec, opt, nil)
}

// BuiltinKind reports whether kind names a built-in layer (or the head).
func BuiltinKind(kind string) bool {
	switch kind {
	case kindDense, kindMLP, kindConv2D, kindUpsample, kindFlatten, kindReshape, kindActivation, kindSequential, kindGaussianHead:
		return true
	}
	return false
}

// UserKinds rebuilds layers of kinds that are not built in: a user's own
// layers, which describe themselves through Describer with a kind of their
// own. The caller owns the value (there is no package-level registry);
// vae.Kinds is one.
type UserKinds interface {
	// LayerParams returns the names and shapes of the parameters of the
	// layer spec describes, without creating them, and false if spec.Kind
	// is not one of its kinds.
	LayerParams(spec Spec) ([]ParamShape, bool, error)
	// BuildLayer builds the layer spec describes, and false if spec.Kind is
	// not one of its kinds.
	BuildLayer(spec Spec, opt Options) (Layer, bool, error)
}

// FromSpecKinds is FromSpec that also rebuilds the kinds of user, at any
// depth inside a Sequential. user may be nil.
func FromSpecKinds(spec Spec, opt Options, user UserKinds) (Layer, error) {
	return fromSpec("layers.FromSpecKinds", spec, opt, user)
}

func fromSpec(where string, spec Spec, opt Options, user UserKinds) (Layer, error) {
	switch spec.Kind {
	case kindDense:
		var c denseConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		return NewDense(c.Name, c.In, c.Out, opt)
	case kindMLP:
		var c mlpConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		return NewMLP(c.Name, c.MLPConfig, opt)
	case kindConv2D:
		var c conv2DConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		return NewConv2D(c.Name, c.Conv2DConfig, opt)
	case kindUpsample:
		var c upsampleConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		return NewUpsample(c.Name, c.Factor)
	case kindFlatten:
		var c flattenConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		return NewFlatten(c.Name), nil
	case kindReshape:
		var c reshapeConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		return NewReshape(c.Name, c.Shape...)
	case kindActivation:
		var c activationConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		if err := c.Activation.check(where, "spec.Config.activation"); err != nil {
			return nil, err
		}
		return c.Activation, nil
	case kindSequential:
		var c sequentialConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return nil, err
		}
		ls := make([]Layer, len(c.Layers))
		for i, sub := range c.Layers {
			l, err := fromSpec(where, sub, opt, user)
			if err != nil {
				return nil, fmt.Errorf("%s: sequential %q layer %d: %w", where, c.Name, i, err)
			}
			ls[i] = l
		}
		return NewSequential(c.Name, ls...)
	case kindGaussianHead:
		return nil, fmt.Errorf("%s: spec.Kind: %q is a head, not a Layer; use NewGaussianHeadFromSpec: %w", where, spec.Kind, ErrUnknownKind)
	}
	if user != nil {
		l, ok, err := user.BuildLayer(spec, opt)
		switch {
		case ok && err != nil:
			return nil, fmt.Errorf("%s: user kind %q: %w", where, spec.Kind, err)
		case ok && l == nil:
			return nil, fmt.Errorf("%s: user kind %q: the builder returned no layer", where, spec.Kind)
		case ok:
			return l, nil
		}
	}
	return nil, fmt.Errorf("%s: spec.Kind: %q: %w", where, spec.Kind, ErrUnknownKind)
}

// NewGaussianHeadFromSpec rebuilds a GaussianHead from the Spec it wrote,
// with the same parameter names and shapes. A Kind other than
// "gaussian_head" gives an error wrapping ErrUnknownKind.
func NewGaussianHeadFromSpec(spec Spec, opt Options) (*GaussianHead, error) {
	const where = "layers.NewGaussianHeadFromSpec"
	if spec.Kind != kindGaussianHead {
		return nil, fmt.Errorf("%s: spec.Kind: %q, want %q: %w", where, spec.Kind, kindGaussianHead, ErrUnknownKind)
	}
	var c headConfig
	if err := decodeConfig(where, spec, &c); err != nil {
		return nil, err
	}
	return NewGaussianHead(c.Name, c.In, c.Latent, opt)
}

// decodeConfig strictly decodes spec.Config into v: unknown fields are an
// error, so a misspelt key does not silently become a zero value.
func decodeConfig(where string, spec Spec, v any) error {
	dec := json.NewDecoder(bytes.NewReader(spec.Config))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return argError(where, "spec.Config", "kind %q: %v", spec.Kind, err)
	}
	return nil
}

// Every built-in layer is a Layer and a Describer.
var (
	_ Layer     = (*Dense)(nil)
	_ Layer     = (*MLP)(nil)
	_ Layer     = (*Conv2D)(nil)
	_ Layer     = (*Upsample)(nil)
	_ Layer     = (*Flatten)(nil)
	_ Layer     = (*Reshape)(nil)
	_ Layer     = (*Sequential)(nil)
	_ Layer     = Activation("")
	_ Describer = (*Dense)(nil)
	_ Describer = (*MLP)(nil)
	_ Describer = (*Conv2D)(nil)
	_ Describer = (*Upsample)(nil)
	_ Describer = (*Flatten)(nil)
	_ Describer = (*Reshape)(nil)
	_ Describer = (*Sequential)(nil)
	_ Describer = Activation("")
	_ Describer = (*GaussianHead)(nil)
)

// ParamShape is the name and shape of one parameter.
type ParamShape struct {
	Name  string
	Shape []int
}

// ParamShapes returns the names and shapes of the parameters that
// FromSpec (or NewGaussianHeadFromSpec, for kind "gaussian_head") would
// create for spec, in the order of the layer's Params, without creating
// them: nothing is allocated in proportion to the sizes the spec claims.
// A checkpoint reader compares the result with the tensors it holds before
// it builds anything. The configs are decoded as strictly as by FromSpec;
// range checks on the sizes are left to FromSpec, and a size that no
// tensor can have (zero or negative) never matches one.
func ParamShapes(spec Spec) ([]ParamShape, error) {
	return ParamShapesKinds(spec, nil)
}

// ParamShapesKinds is ParamShapes that also asks user for the kinds it
// knows, at any depth inside a Sequential. user may be nil.
func ParamShapesKinds(spec Spec, user UserKinds) ([]ParamShape, error) {
	const where = "layers.ParamShapes"
	var out []ParamShape
	err := paramShapes(where, spec, &out, 0, user)
	return out, err
}

// maxSpecDepth bounds the nesting of Sequential specs, so that a crafted
// description cannot exhaust the stack.
const maxSpecDepth = 64

func paramShapes(where string, spec Spec, out *[]ParamShape, depth int, user UserKinds) error {
	dense := func(name string, in, outw int) {
		*out = append(*out, ParamShape{name + ".weight", []int{in, outw}}, ParamShape{name + ".bias", []int{1, outw}})
	}
	switch spec.Kind {
	case kindDense:
		var c denseConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return err
		}
		dense(c.Name, c.In, c.Out)
	case kindMLP:
		var c mlpConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return err
		}
		for i := 0; i+1 < len(c.Sizes); i++ {
			dense(c.Name+"."+strconv.Itoa(i), c.Sizes[i], c.Sizes[i+1])
		}
	case kindConv2D:
		var c conv2DConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return err
		}
		*out = append(*out, ParamShape{c.Name + ".weight", []int{c.Out, c.In, c.Kernel[0], c.Kernel[1]}},
			ParamShape{c.Name + ".bias", []int{1, c.Out, 1, 1}})
	case kindGaussianHead:
		var c headConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return err
		}
		dense(c.Name+".mean", c.In, c.Latent)
		dense(c.Name+".logvar", c.In, c.Latent)
	case kindUpsample:
		var c upsampleConfig
		return decodeConfig(where, spec, &c)
	case kindFlatten:
		var c flattenConfig
		return decodeConfig(where, spec, &c)
	case kindReshape:
		var c reshapeConfig
		return decodeConfig(where, spec, &c)
	case kindActivation:
		var c activationConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return err
		}
		return c.Activation.check(where, "spec.Config.activation")
	case kindSequential:
		if depth >= maxSpecDepth {
			return argError(where, "spec", "sequential layers nested deeper than %d", maxSpecDepth)
		}
		var c sequentialConfig
		if err := decodeConfig(where, spec, &c); err != nil {
			return err
		}
		for i, sub := range c.Layers {
			if err := paramShapes(where, sub, out, depth+1, user); err != nil {
				return fmt.Errorf("%s: sequential %q layer %d: %w", where, c.Name, i, err)
			}
		}
	default:
		if user != nil {
			ps, ok, err := user.LayerParams(spec)
			if ok {
				if err != nil {
					return fmt.Errorf("%s: user kind %q: %w", where, spec.Kind, err)
				}
				*out = append(*out, ps...)
				return nil
			}
		}
		return fmt.Errorf("%s: spec.Kind: %q: %w", where, spec.Kind, ErrUnknownKind)
	}
	return nil
}
