package layers

import (
	"fmt"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// Conv2DConfig describes a 2-D convolution over NCHW batches.
type Conv2DConfig struct {
	// In and Out are the input and output channel counts, each >= 1.
	In  int `json:"in"`
	Out int `json:"out"`
	// Kernel is the (height, width) of the kernel, each >= 1.
	Kernel [2]int `json:"kernel"`
	// Stride is the (vertical, horizontal) step. The zero value means (1, 1).
	Stride [2]int `json:"stride"`
	// Padding is the number of zero rows (top and bottom) and columns (left
	// and right) added around the input; >= 0.
	Padding [2]int `json:"padding"`
	// Activation follows the convolution. The zero value means Identity. It
	// also picks the initialisation scheme when Options.Init is InitAuto.
	Activation Activation `json:"activation"`
}

// Conv2D is a 2-D cross-correlation (what deep learning calls convolution:
// the kernel is not flipped) of an (N, In, H, W) batch with Out kernels,
// plus a bias per output channel, followed by an activation. The output has
// shape (N, Out, H', W') with H' = (H + 2*Padding[0] - Kernel[0]) /
// Stride[0] + 1 (integer division) and likewise W'.
//
// Its parameters are name+".weight", shape (Out, In, Kernel[0], Kernel[1]),
// and name+".bias", shape (1, Out, 1, 1).
type Conv2D struct {
	name   string
	cfg    Conv2DConfig
	weight *Param
	bias   *Param
}

// NewConv2D returns a Conv2D layer. Fans for initialisation are
// In*Kernel[0]*Kernel[1] and Out*Kernel[0]*Kernel[1].
func NewConv2D(name string, cfg Conv2DConfig, opt Options) (*Conv2D, error) {
	const where = "layers.NewConv2D"
	if name == "" {
		return nil, argError(where, "name", "empty")
	}
	if cfg.In < 1 {
		return nil, argError(where, "cfg.In", "%d for layer %q, want >= 1", cfg.In, name)
	}
	if cfg.Out < 1 {
		return nil, argError(where, "cfg.Out", "%d for layer %q, want >= 1", cfg.Out, name)
	}
	if cfg.Kernel[0] < 1 || cfg.Kernel[1] < 1 {
		return nil, argError(where, "cfg.Kernel", "%v for layer %q, want both >= 1", cfg.Kernel, name)
	}
	if cfg.Stride == [2]int{} {
		cfg.Stride = [2]int{1, 1}
	}
	if cfg.Stride[0] < 1 || cfg.Stride[1] < 1 {
		return nil, argError(where, "cfg.Stride", "%v for layer %q, want both >= 1", cfg.Stride, name)
	}
	if cfg.Padding[0] < 0 || cfg.Padding[1] < 0 {
		return nil, argError(where, "cfg.Padding", "%v for layer %q, want both >= 0", cfg.Padding, name)
	}
	cfg.Activation = cfg.Activation.orDefault(Identity)
	if err := cfg.Activation.check(where, "cfg.Activation"); err != nil {
		return nil, err
	}
	dt, err := opt.resolve(where)
	if err != nil {
		return nil, err
	}
	area := cfg.Kernel[0] * cfg.Kernel[1]
	return &Conv2D{
		name: name,
		cfg:  cfg,
		weight: newWeight(name+".weight", dt, []int{cfg.Out, cfg.In, cfg.Kernel[0], cfg.Kernel[1]},
			opt.scheme(cfg.Activation), cfg.In*area, cfg.Out*area, cfg.Activation, opt.Seed),
		bias: newZeros(name+".bias", dt, []int{1, cfg.Out, 1, 1}),
	}, nil
}

// Name returns the layer's name.
func (c *Conv2D) Name() string { return c.name }

// Config returns the configuration with defaults filled in.
func (c *Conv2D) Config() Conv2DConfig { return c.cfg }

// OutputSize returns the output height and width for an input of h by w,
// and false when the kernel does not fit.
func (c *Conv2D) OutputSize(h, w int) (oh, ow int, ok bool) {
	oh = (h+2*c.cfg.Padding[0]-c.cfg.Kernel[0])/c.cfg.Stride[0] + 1
	ow = (w+2*c.cfg.Padding[1]-c.cfg.Kernel[1])/c.cfg.Stride[1] + 1
	ok = h+2*c.cfg.Padding[0] >= c.cfg.Kernel[0] && w+2*c.cfg.Padding[1] >= c.cfg.Kernel[1]
	return oh, ow, ok
}

// Params returns the weight and the bias, in that order.
func (c *Conv2D) Params() []*Param { return []*Param{c.weight, c.bias} }

// Forward convolves x of shape (N, In, H, W).
func (c *Conv2D) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	where := "layers.Conv2D(" + c.name + ").Forward"
	if err := checkInput(where, s, x, c.weight.Value.Dtype()); err != nil {
		return nil, err
	}
	sh := x.Shape()
	if sh.Dims() != 4 || sh[1] != c.cfg.In || sh[0] < 1 {
		return nil, argError(where, "x", "shape %v, want (N, %d, H, W)", sh, c.cfg.In)
	}
	if _, _, ok := c.OutputSize(sh[2], sh[3]); !ok {
		return nil, argError(where, "x", "spatial size %dx%d is smaller than the kernel %v with padding %v", sh[2], sh[3], c.cfg.Kernel, c.cfg.Padding)
	}
	y, err := G.Conv2d(x, s.Bind(c.weight), tensor.Shape{c.cfg.Kernel[0], c.cfg.Kernel[1]},
		c.cfg.Padding[:], c.cfg.Stride[:], []int{1, 1})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if y, err = G.BroadcastAdd(y, s.Bind(c.bias), nil, []byte{0, 2, 3}); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	if y, err = c.cfg.Activation.Apply(y); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Spec describes the layer (kind "conv2d").
func (c *Conv2D) Spec() Spec {
	return makeSpec(kindConv2D, conv2DConfig{Name: c.name, Conv2DConfig: c.cfg})
}

type conv2DConfig struct {
	Name string `json:"name"`
	Conv2DConfig
}

// Upsample repeats every pixel of an (N, C, H, W) batch Factor times along
// both spatial axes (nearest-neighbour upsampling), giving
// (N, C, Factor*H, Factor*W). Follow it with a Conv2D to build the
// upsampling path of a convolutional decoder. It has no parameters.
type Upsample struct {
	name   string
	factor int
}

// NewUpsample returns an Upsample layer; factor must be >= 1.
func NewUpsample(name string, factor int) (*Upsample, error) {
	if factor < 1 {
		return nil, argError("layers.NewUpsample", "factor", "%d for layer %q, want >= 1", factor, name)
	}
	return &Upsample{name: name, factor: factor}, nil
}

// Factor returns the upsampling factor.
func (u *Upsample) Factor() int { return u.factor }

// Params returns nil.
func (u *Upsample) Params() []*Param { return nil }

// Forward upsamples x of shape (N, C, H, W).
func (u *Upsample) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	where := "layers.Upsample(" + u.name + ").Forward"
	if err := checkInputAnyFloat(where, s, x); err != nil {
		return nil, err
	}
	if sh := x.Shape(); sh.Dims() != 4 {
		return nil, argError(where, "x", "shape %v, want (N, C, H, W)", sh)
	}
	if u.factor == 1 {
		return x, nil
	}
	y, err := G.Upsample2D(x, u.factor)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Spec describes the layer (kind "upsample").
func (u *Upsample) Spec() Spec {
	return makeSpec(kindUpsample, upsampleConfig{Name: u.name, Factor: u.factor})
}

type upsampleConfig struct {
	Name   string `json:"name"`
	Factor int    `json:"factor"`
}

// Flatten maps (N, d1, d2, ...) to (N, d1*d2*...), row-major, so an
// (N, C, H, W) batch becomes (N, C*H*W) with the channel slowest. It has no
// parameters.
type Flatten struct {
	name string
}

// NewFlatten returns a Flatten layer.
func NewFlatten(name string) *Flatten { return &Flatten{name: name} }

// Params returns nil.
func (f *Flatten) Params() []*Param { return nil }

// Forward flattens x, which must have at least two dimensions.
func (f *Flatten) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	where := "layers.Flatten(" + f.name + ").Forward"
	if err := checkInputAnyFloat(where, s, x); err != nil {
		return nil, err
	}
	sh := x.Shape()
	if sh.Dims() < 2 {
		return nil, argError(where, "x", "shape %v, want (N, ...)", sh)
	}
	if sh.Dims() == 2 {
		return x, nil
	}
	y, err := reshape(x, tensor.Shape{sh[0], sh.TotalSize() / sh[0]})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Spec describes the layer (kind "flatten").
func (f *Flatten) Spec() Spec { return makeSpec(kindFlatten, flattenConfig{Name: f.name}) }

type flattenConfig struct {
	Name string `json:"name"`
}

// Reshape maps (N, F) to (N, Shape...), row-major; the product of Shape
// must be F. It is the inverse of Flatten, e.g. between the Dense and the
// Conv2D layers of a decoder. It has no parameters.
type Reshape struct {
	name  string
	shape []int
}

// NewReshape returns a Reshape layer to (N, shape...); every entry must be
// >= 1 and there must be at least one.
func NewReshape(name string, shape ...int) (*Reshape, error) {
	const where = "layers.NewReshape"
	if len(shape) == 0 {
		return nil, argError(where, "shape", "empty for layer %q", name)
	}
	for i, d := range shape {
		if d < 1 {
			return nil, argError(where, fmt.Sprintf("shape[%d]", i), "%d for layer %q, want >= 1", d, name)
		}
	}
	return &Reshape{name: name, shape: append([]int(nil), shape...)}, nil
}

// Shape returns the target shape without the batch axis.
func (r *Reshape) Shape() []int { return append([]int(nil), r.shape...) }

// Params returns nil.
func (r *Reshape) Params() []*Param { return nil }

// Forward reshapes x of shape (N, F).
func (r *Reshape) Forward(s *Scope, x *G.Node) (*G.Node, error) {
	where := "layers.Reshape(" + r.name + ").Forward"
	if err := checkInputAnyFloat(where, s, x); err != nil {
		return nil, err
	}
	sh := x.Shape()
	want := 1
	for _, d := range r.shape {
		want *= d
	}
	if sh.Dims() != 2 || sh[1] != want {
		return nil, argError(where, "x", "shape %v, want (N, %d) to reshape to (N, %v)", sh, want, r.shape)
	}
	to := append(tensor.Shape{sh[0]}, r.shape...)
	y, err := reshape(x, to)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	return y, nil
}

// Spec describes the layer (kind "reshape").
func (r *Reshape) Spec() Spec {
	return makeSpec(kindReshape, reshapeConfig{Name: r.name, Shape: r.Shape()})
}

type reshapeConfig struct {
	Name  string `json:"name"`
	Shape []int  `json:"shape"`
}

// checkInputAnyFloat validates the scope and a float32 or float64 input.
func checkInputAnyFloat(where string, s *Scope, x *G.Node) error {
	if x == nil {
		return argError(where, "x", "nil node")
	}
	dt := x.Dtype()
	if dt != tensor.Float32 && dt != tensor.Float64 {
		return argError(where, "x", "dtype %v is not float32 or float64", dt)
	}
	return checkInput(where, s, x, dt)
}

// reshape is G.Reshape made safe for leaf nodes.
//
// Gorgonia quirk (v0.9.18): G.Reshape of a leaf node (an input or a
// parameter) returns a tensor that shares the leaf's backing array, but the
// TapeMachine gives it a register of its own and treats it as scratch
// space, so a later elementwise op it compiles as in-place (including ops of
// the backward pass) writes straight into the caller's input or parameter
// tensor. Copying a leaf first (x + 0 never runs in place on a leaf) gives
// the reshape its own memory. Reshapes of computed nodes are safe and left
// as they are.
func reshape(x *G.Node, to tensor.Shape) (*G.Node, error) {
	if x.Op() == nil {
		c, err := G.Add(x, constLike(x, 0))
		if err != nil {
			return nil, err
		}
		x = c
	}
	return G.Reshape(x, to)
}
