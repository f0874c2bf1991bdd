package layers

import (
	"encoding/binary"
	"fmt"
	"hash/fnv"
	"math"
	"math/rand/v2"

	"gorgonia.org/tensor"
)

// Options are the settings every constructor takes. The zero value is
// usable: float32 parameters, seed 0 and the initialisation scheme that suits
// the layer's activation.
type Options struct {
	// Dtype of the parameters: tensor.Float32 or tensor.Float64. The zero
	// value means tensor.Float32.
	Dtype tensor.Dtype
	// Seed of the weight initialisation. Each parameter draws from its own
	// PCG source seeded with (Seed, FNV-1a hash of the parameter's name), so
	// a parameter's initial values depend only on Seed and its name, not on
	// the order in which layers are built.
	Seed uint64
	// Init is the weight initialisation scheme. The zero value, InitAuto,
	// picks GlorotUniform for identity, tanh and sigmoid layers and
	// HeNormal for the ReLU family (relu, leaky_relu, elu, softplus).
	Init Init
}

// Init names a weight initialisation scheme. Biases always start at zero.
//
// In the formulas fanIn and fanOut count the inputs and outputs of one unit:
// for Dense they are in and out; for Conv2D they are in*kh*kw and
// out*kh*kw.
type Init int

const (
	// InitAuto picks the scheme from the layer's activation: HeNormal for
	// relu, leaky_relu, elu and softplus, GlorotUniform otherwise.
	InitAuto Init = iota
	// GlorotUniform draws from U(-a, a) with a = sqrt(6 / (fanIn + fanOut)),
	// so the variance is 2 / (fanIn + fanOut) (Glorot and Bengio 2010,
	// "Understanding the difficulty of training deep feedforward neural
	// networks", eq. 16).
	GlorotUniform
	// GlorotNormal draws from N(0, 2 / (fanIn + fanOut)), the same variance
	// as GlorotUniform with a Gaussian shape.
	GlorotNormal
	// HeNormal draws from N(0, 2 / ((1 + a^2) fanIn)) where a is the
	// negative slope of the activation (0 for relu, 0.01 for leaky_relu)
	// (He, Zhang, Ren and Sun 2015, "Delving deep into rectifiers", eq. 15).
	HeNormal
	// HeUniform draws from U(-b, b) with b = sqrt(3) times the HeNormal
	// standard deviation: the same variance with a uniform shape.
	HeUniform
	// Zeros sets every weight to zero. Useful for tests and for layers that
	// should start as the identity of a residual path; not for hidden layers.
	Zeros
)

// String returns the scheme's name.
func (i Init) String() string {
	switch i {
	case InitAuto:
		return "auto"
	case GlorotUniform:
		return "glorot_uniform"
	case GlorotNormal:
		return "glorot_normal"
	case HeNormal:
		return "he_normal"
	case HeUniform:
		return "he_uniform"
	case Zeros:
		return "zeros"
	}
	return fmt.Sprintf("Init(%d)", int(i))
}

// resolve returns the dtype (defaulted) after validating the options.
func (o Options) resolve(where string) (tensor.Dtype, error) {
	dt := o.Dtype
	if dt == (tensor.Dtype{}) {
		dt = tensor.Float32
	}
	if dt != tensor.Float32 && dt != tensor.Float64 {
		return dt, argError(where, "opt.Dtype", "%v is not float32 or float64", o.Dtype)
	}
	if o.Init < InitAuto || o.Init > Zeros {
		return dt, argError(where, "opt.Init", "unknown scheme %d", int(o.Init))
	}
	return dt, nil
}

// scheme returns the concrete scheme for a layer followed by act.
func (o Options) scheme(act Activation) Init {
	if o.Init != InitAuto {
		return o.Init
	}
	switch act {
	case ReLU, LeakyReLU, ELU, Softplus:
		return HeNormal
	}
	return GlorotUniform
}

// InitStd returns the standard deviation of the weights that scheme draws
// for a layer with the given fans, followed by activation act (used only
// for the He schemes' negative slope). It is exported so that callers and
// tests can check a layer against the published formula.
func InitStd(scheme Init, fanIn, fanOut int, act Activation) float64 {
	switch scheme {
	case GlorotUniform, GlorotNormal:
		return math.Sqrt(2 / float64(fanIn+fanOut))
	case HeNormal, HeUniform:
		a := act.negativeSlope()
		return math.Sqrt(2 / ((1 + a*a) * float64(fanIn)))
	}
	return 0
}

// paramRNG returns the PCG source of one parameter: seeded by the options'
// seed and the FNV-1a hash of the parameter's name.
func paramRNG(seed uint64, name string) *rand.Rand {
	h := fnv.New64a()
	var b [8]byte
	binary.LittleEndian.PutUint64(b[:], seed)
	h.Write(b[:])
	h.Write([]byte(name))
	return rand.New(rand.NewPCG(seed, h.Sum64()))
}

// newWeight returns a parameter of the given shape filled by scheme.
func newWeight(name string, dt tensor.Dtype, shape []int, scheme Init, fanIn, fanOut int, act Activation, seed uint64) *Param {
	t := tensor.New(tensor.Of(dt), tensor.WithShape(shape...))
	std := InitStd(scheme, fanIn, fanOut, act)
	rng := paramRNG(seed, name)
	var draw func() float64
	switch scheme {
	case GlorotUniform, HeUniform:
		a := std * math.Sqrt(3)
		draw = func() float64 { return (2*rng.Float64() - 1) * a }
	case GlorotNormal, HeNormal:
		draw = func() float64 { return rng.NormFloat64() * std }
	default:
		draw = func() float64 { return 0 }
	}
	switch data := t.Data().(type) {
	case []float64:
		for i := range data {
			data[i] = draw()
		}
	case []float32:
		for i := range data {
			data[i] = float32(draw())
		}
	}
	return &Param{Name: name, Value: t}
}

// newZeros returns a zero parameter of the given shape.
func newZeros(name string, dt tensor.Dtype, shape []int) *Param {
	return &Param{Name: name, Value: tensor.New(tensor.Of(dt), tensor.WithShape(shape...))}
}
