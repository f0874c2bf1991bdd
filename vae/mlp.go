package vae

import (
	"slices"

	"gorgonia.org/tensor"

	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// MLPConfig describes a fully connected VAE: an encoder MLP of widths
// Input, Hidden..., a Gaussian head to Latent, and a decoder MLP of widths
// Latent, Hidden reversed..., Input. Parameter names start with "encoder.",
// "head." and "decoder.".
type MLPConfig struct {
	Input  int   // features per record, F
	Hidden []int // hidden widths of the encoder; the decoder mirrors them
	Latent int   // D
	// Activation after every hidden layer; zero means ReLU.
	Activation layers.Activation
	// Likelihood; nil means losses.Bernoulli (decoder outputs logits).
	Likelihood losses.Likelihood
	// Prior; nil means MakePrior's result, or the standard normal.
	Prior priors.Prior
	// MakePrior, when set and Prior is nil, builds the prior from the
	// model's encoder and head (as a VampPrior needs).
	MakePrior func(encoder layers.Layer, head *layers.GaussianHead) (priors.Prior, error)
	// Classes > 0 makes the model conditional (see Config.Classes).
	Classes int
	// Dtype; zero means Float32.
	Dtype tensor.Dtype
	// Seed of the weight initialisation.
	Seed uint64
}

// NewMLP builds the model that MLPConfig describes. The standard MNIST
// model is NewMLP(MLPConfig{Input: 784, Hidden: []int{400}, Latent: 20}).
func NewMLP(cfg MLPConfig) (*Model, error) {
	if cfg.Input < 1 {
		return nil, configError("Input", "%d, want >= 1", cfg.Input)
	}
	if cfg.Latent < 1 {
		return nil, configError("Latent", "%d, want >= 1", cfg.Latent)
	}
	if len(cfg.Hidden) == 0 {
		return nil, configError("Hidden", "want at least one hidden layer")
	}
	if cfg.Classes < 0 {
		return nil, configError("Classes", "%d is negative", cfg.Classes)
	}
	opt := layers.Options{Dtype: cfg.Dtype, Seed: cfg.Seed}
	// A columns likelihood sets both ends: the encoder takes the
	// model-input layout (one-hot categories and the mask), the decoder
	// gives one output per column and one per category.
	encIn, decOut := cfg.Input, cfg.Input
	if c, ok := cfg.Likelihood.(*losses.Columns); ok {
		encIn, decOut = c.EncoderWidth(), c.OutputWidth()
	} else if ow, ok := cfg.Likelihood.(interface{ OutputWidth() int }); ok {
		decOut = ow.OutputWidth()
	}
	encSizes := append([]int{encIn + cfg.Classes}, cfg.Hidden...)
	enc, err := layers.NewMLP("encoder", layers.MLPConfig{Sizes: encSizes, Activation: cfg.Activation, Output: orReLU(cfg.Activation)}, opt)
	if err != nil {
		return nil, configWrap("Hidden", err)
	}
	head, err := layers.NewGaussianHead("head", cfg.Hidden[len(cfg.Hidden)-1], cfg.Latent, opt)
	if err != nil {
		return nil, configWrap("Latent", err)
	}
	decSizes := []int{cfg.Latent + cfg.Classes}
	hidden := slices.Clone(cfg.Hidden)
	slices.Reverse(hidden)
	decSizes = append(append(decSizes, hidden...), decOut)
	dec, err := layers.NewMLP("decoder", layers.MLPConfig{Sizes: decSizes, Activation: cfg.Activation}, opt)
	if err != nil {
		return nil, configWrap("Hidden", err)
	}
	prior := cfg.Prior
	if prior == nil && cfg.MakePrior != nil {
		if prior, err = cfg.MakePrior(enc, head); err != nil {
			return nil, configWrap("MakePrior", err)
		}
	}
	return New(Config{InputShape: []int{cfg.Input}, Encoder: enc, Head: head, Decoder: dec,
		Likelihood: cfg.Likelihood, Prior: prior, Classes: cfg.Classes, Dtype: cfg.Dtype})
}

func orReLU(a layers.Activation) layers.Activation {
	if a == "" {
		return layers.ReLU
	}
	return a
}
