// Command parts trains a conditional variational autoencoder on small
// drawings of machine parts and shows what it learned.
//
// The images are invented for this demo: 28x28 greyscale silhouettes of
// five part types (washer, hex nut, bracket, gear, spring), drawn
// procedurally by draw.go and anti-aliased by supersampling. Every image
// draws a "style" that all part types share: size, wall or stroke
// thickness, a rotation within +-12 degrees of upright and a shift of up to
// one pixel. The model is
// conditioned on the part type (Sohn et al. 2015): the encoder sees the
// image with the label appended as constant planes, the decoder sees z and
// the one-hot label. Because the label tells the decoder which part to
// draw, z is left to carry the rest ("style": size, orientation, position,
// thickness), so one z decoded under different labels gives different parts
// in a similar style.
//
// It writes, into -out:
//
//	samples.png          prior samples decoded under every label, one row per part type
//	reconstructions.png  held-out images beside their reconstructions
//	sweep.png            one grid of z over two latent dimensions, decoded under every label
//	model.safetensors    the trained model (reload it with vae.Load)
//
// Run it with
//
//	go run ./examples/parts -epochs 16 -out out/parts
package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
)

func main() {
	cfg, err := parseFlags(os.Args[1:], os.Stderr)
	if err == flag.ErrHelp {
		return
	}
	if err != nil {
		os.Exit(2)
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	cfg.Log, cfg.Progress = os.Stdout, os.Stdout // a bar on a terminal, epoch lines otherwise
	if err := run(ctx, cfg); err != nil {
		fmt.Fprintln(os.Stderr, err)
		stop()
		os.Exit(1)
	}
}

const usageHeader = `Usage: parts [flags]

Trains a conditional VAE on procedurally drawn 28x28 silhouettes of five
machine-part types (washer, hex nut, bracket, gear, spring; the images are
invented for the demo) and writes samples.png, reconstructions.png,
sweep.png and model.safetensors into -out. The encoder is two stride-2
convolutions over the image plus one constant plane per label, the decoder
an MLP from z and the one-hot label; pixel intensities are treated as
Bernoulli probabilities. With the defaults it takes about a minute on two
cores.

Flags:
`

// parseFlags reads the command line into a config, printing usage and
// errors to out.
func parseFlags(args []string, out io.Writer) (config, error) {
	c := defaultConfig()
	fs := flag.NewFlagSet("parts", flag.ContinueOnError)
	fs.SetOutput(out)
	fs.Usage = func() {
		fmt.Fprint(out, usageHeader)
		fs.PrintDefaults()
	}
	fs.StringVar(&c.Out, "out", c.Out, "output `directory` (created if missing)")
	fs.Uint64Var(&c.Seed, "seed", c.Seed, "random seed for the images, the initial weights, training and sampling")
	fs.IntVar(&c.Epochs, "epochs", c.Epochs, "training passes over the images")
	fs.IntVar(&c.Train, "train", c.Train, "number of training images, balanced over the five part types")
	fs.IntVar(&c.Test, "test", c.Test, "number of held-out images, used for validation and reconstructions.png")
	fs.IntVar(&c.Latent, "latent", c.Latent, "latent size; with more than 2 the sweep varies the two dimensions with the largest held-out KL and holds the rest at 0")
	fs.IntVar(&c.Channels, "channels", c.Channels, "channels of the first convolution (the second has twice as many)")
	fs.IntVar(&c.Hidden, "hidden", c.Hidden, "width of the encoder's dense layer and of the decoder's first hidden layer (the second is twice as wide)")
	fs.IntVar(&c.Batch, "batch", c.Batch, "images per optimiser step")
	fs.Float64Var(&c.LearnRate, "lr", c.LearnRate, "Adam learning rate")
	fs.IntVar(&c.Samples, "samples", c.Samples, "prior samples per part type in samples.png")
	fs.IntVar(&c.Pairs, "pairs", c.Pairs, "input/reconstruction pairs per part type in reconstructions.png")
	fs.IntVar(&c.Grid, "grid", c.Grid, "the sweep decodes a grid x grid lattice of z per part type")
	fs.Float64Var(&c.Span, "span", c.Span, "the sweep runs from -span to span in each swept latent dimension (prior standard deviations)")
	fs.IntVar(&c.Scale, "scale", c.Scale, "magnification: every image pixel becomes scale x scale pixels in the figures")
	if err := fs.Parse(args); err != nil {
		return c, err
	}
	if fs.NArg() > 0 {
		err := fmt.Errorf("parts: unexpected arguments %q", fs.Args())
		fmt.Fprintln(out, err)
		fs.Usage()
		return c, err
	}
	if err := c.check(); err != nil {
		fmt.Fprintln(out, err)
		fmt.Fprintln(out, "run parts -h for help")
		return c, err
	}
	return c, nil
}
