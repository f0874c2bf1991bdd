// Package layers holds the building blocks that map one batch node of a
// gorgonia graph to another: the Layer interface and Scope, the built-in
// layers (Dense, MLP, Conv2D, Upsample, Flatten, Reshape, Sequential and the
// activations), the Gaussian encoder head and the reparameterisation
// sampler.
//
// # Layers and scopes
//
// A Layer owns its parameters (*Param: a stable name and one
// *tensor.Dense) and adds its computation to a graph on each call of
// Forward(s, x). It never keeps nodes, so the same layer serves a training
// graph and any number of inference graphs. Parameters enter a graph only
// through Scope.Bind, which creates one node per parameter per graph, backed
// by the parameter's own tensor: an optimiser step through the training
// graph is seen by every other graph at once. Scope.Nodes and Scope.Params
// list what was bound, in first-use order, ready for G.Grad and for the
// optimiser. Use one Scope per graph.
//
// # Parameter names
//
// Names are checkpoint tensor names and follow one scheme, with "." as the
// separator:
//
//	Dense "fc":            fc.weight (in, out), fc.bias (1, out)
//	MLP "enc":             enc.0.weight, enc.0.bias, enc.1.weight, ...
//	Conv2D "c":            c.weight (out, in, kh, kw), c.bias (1, out, 1, 1)
//	GaussianHead "head":   head.mean.weight, head.mean.bias,
//	                       head.logvar.weight, head.logvar.bias
//
// Give every layer of a model its own name (e.g. "enc.body", "dec.conv1");
// NewSequential rejects two parameters with the same name.
//
// # Building encoders and decoders
//
// MLP covers the fully connected case. For convolutional models, chain
// layers with Sequential: an encoder body such as Conv2D (stride 2), Conv2D,
// Flatten, Dense; a decoder such as Dense, Reshape, Upsample, Conv2D,
// Upsample, Conv2D, Flatten. Upsample followed by Conv2D is the upsampling
// path (nearest-neighbour upsampling, then a learned convolution).
// Activations are layers too (ReLU, Tanh, ...), so they can sit between
// other layers.
//
// # Rebuilding from a Spec
//
// Every built-in layer implements Describer: Spec returns its kind and a
// JSON config (names, sizes, activations; not the dtype or the numbers).
// FromSpec(spec, opt) rebuilds any built-in layer, including nested
// Sequentials, with the same parameter names and shapes; the caller then
// loads the values from a checkpoint. NewGaussianHeadFromSpec does the same
// for the head. An unknown kind gives an error wrapping ErrUnknownKind.
//
// # Initialisation
//
// Options.Init picks the weight scheme; biases start at zero. The zero
// value, InitAuto, uses HeNormal (He et al. 2015: N(0, 2/((1+a^2) fanIn)),
// a the negative slope) when the layer is followed by relu, leaky_relu, elu
// or softplus, and GlorotUniform (Glorot and Bengio 2010: U(-a, a),
// a = sqrt(6/(fanIn+fanOut))) otherwise, including bare Dense layers and
// the head. MLP and Conv2D know the activation that follows each weight;
// when a ReLU follows a bare Dense in a Sequential, set Init: HeNormal
// yourself. Each parameter draws from its own PCG source seeded by
// (Options.Seed, FNV-1a hash of its name), so the same seed and names give
// the same bits whatever the construction order, and different names give
// different numbers.
//
// # Dtypes
//
// Options.Dtype is tensor.Float32 (the zero value) or tensor.Float64. A
// layer's Forward requires its input in the same dtype and says so
// otherwise. float64 is what the package's reference tests use.
//
// # The Gaussian head and its log-variance bound
//
// GaussianHead maps features to mu and logVar of a diagonal Gaussian. A raw
// log-variance r that drifts far from zero would make exp(r) overflow
// float32 (above about 88) or vanish, and 1/sigma^2 with it, turning the
// loss and its gradients into Inf or NaN. The head therefore emits
//
//	logVar = SoftClamp(r, LogVarMin, LogVarMax) = r + softplus(lo - r) - softplus(r - hi)
//
// with bounds (-30, 20). It is a smooth, increasing map into (-30, 20)
// that equals r to within 1e-5, with slope 1 to within 1e-5, for r in
// [-18, 8], so it does not disturb training in the normal range; beyond a
// bound its slope decays gradually instead of dropping to zero as a hard
// clamp's does.
//
// # Sampling
//
// Reparameterize(mu, logVar, eps) returns mu + exp(logVar/2)*eps; eps is an
// input node of shape (K*N, D) that the caller refills with FillNormal from
// a seeded *rand.Rand before each run. K > 1 gives K samples per record;
// sample k of record n is row k*N + n.
//
// # Activations
//
// relu, leaky_relu (slope LeakySlope = 0.01 below zero), tanh, sigmoid,
// softplus (computed exactly as max(x,0) + log1p(exp(-|x|)); gorgonia's own
// Softplus returns x unchanged above 16), elu (alpha ELUAlpha = 1) and
// identity. Any other name is an error wrapping ErrInvalidArgument.
//
// # Errors
//
// Constructors validate sizes (>= 1), names and configs; Forward validates
// the input's rank, trailing sizes, dtype and graph. Errors name the
// function or layer and the argument and wrap ErrInvalidArgument. Nothing in
// the package panics on user input.
//
// # A gorgonia quirk handled here
//
// G.Reshape of a leaf node (an input or a parameter) shares the leaf's
// memory, yet gorgonia's TapeMachine may then run a later elementwise op in
// place on the reshaped node and so overwrite the caller's tensor. Flatten,
// Reshape and Reparameterize copy leaf inputs before reshaping; code that
// calls G.Reshape on inputs directly should do the same.
package layers
