package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/examples/internal/progress"
	"lowerbound.dev/layers"
	"lowerbound.dev/vae"
	"lowerbound.dev/vae/dataset"
)

// config holds everything run needs; main fills it from the flags.
type config struct {
	Out       string  // output directory, created if missing
	Seed      uint64  // drives the data, the initial weights, training and sampling
	Epochs    int     // passes over the training images
	Train     int     // training images (balanced over the part types)
	Test      int     // held-out images, for validation and reconstructions
	Latent    int     // latent size D, >= 2
	Channels  int     // channels of the first convolution; the second has twice as many
	Hidden    int     // width of the encoder's dense layer and of the decoder's hidden layers
	Batch     int     // images per optimiser step
	LearnRate float64 // Adam learning rate
	Samples   int     // samples per row of samples.png
	Pairs     int     // input/reconstruction pairs per row of reconstructions.png
	Grid      int     // the sweep decodes a Grid x Grid lattice of z
	Span      float64 // the sweep covers [-Span, Span] in each of the two swept dimensions
	Scale     int     // every image pixel becomes Scale x Scale figure pixels

	Log      io.Writer // summary lines; nil discards them
	Progress io.Writer // the training progress display; nil discards it
}

func defaultConfig() config {
	return config{
		Out:       filepath.Join("out", "parts"),
		Seed:      1,
		Epochs:    16,
		Train:     3000,
		Test:      500,
		Latent:    2,
		Channels:  8,
		Hidden:    128,
		Batch:     50,
		LearnRate: 2e-3,
		Samples:   10,
		Pairs:     5,
		Grid:      7,
		Span:      2,
		Scale:     3,
	}
}

// check reports the first invalid field.
func (c config) check() error {
	bad := func(flag string, format string, a ...any) error {
		return fmt.Errorf("parts: -%s: %s", flag, fmt.Sprintf(format, a...))
	}
	switch {
	case c.Out == "":
		return bad("out", "empty")
	case c.Epochs < 1:
		return bad("epochs", "%d, want >= 1", c.Epochs)
	case c.Train < NumParts:
		return bad("train", "%d, want >= %d (one per part type)", c.Train, NumParts)
	case c.Test < NumParts:
		return bad("test", "%d, want >= %d (one per part type)", c.Test, NumParts)
	case c.Latent < 2:
		return bad("latent", "%d, want >= 2 (the sweep needs two dimensions)", c.Latent)
	case c.Channels < 1:
		return bad("channels", "%d, want >= 1", c.Channels)
	case c.Hidden < 1:
		return bad("hidden", "%d, want >= 1", c.Hidden)
	case c.Batch < 1:
		return bad("batch", "%d, want >= 1", c.Batch)
	case !(c.LearnRate > 0):
		return bad("lr", "%v, want > 0", c.LearnRate)
	case c.Samples < 1:
		return bad("samples", "%d, want >= 1", c.Samples)
	case c.Pairs < 1:
		return bad("pairs", "%d, want >= 1", c.Pairs)
	case c.Grid < 2:
		return bad("grid", "%d, want >= 2", c.Grid)
	case !(c.Span > 0):
		return bad("span", "%v, want > 0", c.Span)
	case c.Scale < 1 || c.Scale > 16:
		return bad("scale", "%d, want 1..16", c.Scale)
	}
	return nil
}

// buildModel returns the conditional VAE: a convolutional encoder over the
// image and the label planes, a Gaussian head, and an MLP decoder from z
// and the one-hot label to one logit per pixel (Bernoulli likelihood).
func buildModel(c config) (*vae.Model, error) {
	opt := layers.Options{Seed: c.Seed}
	// Encoder input: the image plus NumParts label planes (vae.Config.Classes).
	conv1, err := layers.NewConv2D("encoder.conv1", layers.Conv2DConfig{
		In: 1 + NumParts, Out: c.Channels, Kernel: [2]int{3, 3}, Stride: [2]int{2, 2}, Padding: [2]int{1, 1},
		Activation: layers.ReLU}, opt) // 28x28 -> 14x14
	if err != nil {
		return nil, err
	}
	conv2, err := layers.NewConv2D("encoder.conv2", layers.Conv2DConfig{
		In: c.Channels, Out: 2 * c.Channels, Kernel: [2]int{3, 3}, Stride: [2]int{2, 2}, Padding: [2]int{1, 1},
		Activation: layers.ReLU}, opt) // 14x14 -> 7x7
	if err != nil {
		return nil, err
	}
	dense, err := layers.NewMLP("encoder.dense", layers.MLPConfig{
		Sizes: []int{2 * c.Channels * 7 * 7, c.Hidden}, Output: layers.ReLU}, opt)
	if err != nil {
		return nil, err
	}
	enc, err := layers.NewSequential("encoder", conv1, conv2, layers.NewFlatten("encoder.flatten"), dense)
	if err != nil {
		return nil, err
	}
	head, err := layers.NewGaussianHead("head", c.Hidden, c.Latent, opt)
	if err != nil {
		return nil, err
	}
	// Decoder input: z and the one-hot label; output: Side*Side logits.
	dec, err := layers.NewMLP("decoder", layers.MLPConfig{
		Sizes:      []int{c.Latent + NumParts, c.Hidden, 2 * c.Hidden, Side * Side},
		Activation: layers.ReLU, Output: layers.Identity}, opt)
	if err != nil {
		return nil, err
	}
	// Likelihood nil means Bernoulli: each pixel's intensity in [0, 1] is
	// treated as the probability of "ink" (common practice for [0, 1]
	// images; the intensities are not binarised).
	return vae.New(vae.Config{
		InputShape: []int{1, Side, Side},
		Encoder:    enc,
		Head:       head,
		Decoder:    dec,
		Classes:    NumParts,
	})
}

// run draws the data, trains the model, and writes the figures and the
// checkpoint into c.Out.
func run(ctx context.Context, c config) error {
	if err := c.check(); err != nil {
		return err
	}
	logw := c.Log
	if logw == nil {
		logw = io.Discard
	}
	logf := func(format string, a ...any) { fmt.Fprintf(logw, format+"\n", a...) }
	if err := os.MkdirAll(c.Out, 0o755); err != nil {
		return fmt.Errorf("parts: %w", err)
	}
	start := time.Now()

	train, err := makeSet(c.Train, c.Seed, 0)
	if err != nil {
		return fmt.Errorf("parts: drawing the training images: %w", err)
	}
	test, err := makeSet(c.Test, c.Seed, c.Train) // indices after the training ones: no overlap
	if err != nil {
		return fmt.Errorf("parts: drawing the held-out images: %w", err)
	}
	logf("drew %d training and %d held-out images (%d part types) in %v", c.Train, c.Test, NumParts, since(start))

	m, err := buildModel(c)
	if err != nil {
		return fmt.Errorf("parts: building the model: %w", err)
	}
	names := make([]string, NumParts)
	for p := range NumParts {
		names[p] = Part(p).String()
	}
	if err := m.SetExtra("parts.labels", strings.Join(names, ",")); err != nil {
		return fmt.Errorf("parts: %w", err)
	}

	pw := c.Progress
	if pw == nil {
		pw = io.Discard
	}
	rep := progress.New(progress.Options{Out: pw, Label: "train", Epochs: c.Epochs,
		StepsPerEpoch: progress.Steps(train.Len(), c.Batch)})
	history, err := m.Train(ctx, train, vae.TrainConfig{
		Epochs:     c.Epochs,
		BatchSize:  c.Batch,
		LearnRate:  c.LearnRate,
		Seed:       c.Seed,
		Validation: test,
		OnStep:     rep.OnStep,
		OnEpoch:    rep.OnEpoch,
	})
	took := rep.Done()
	if err != nil {
		return fmt.Errorf("parts: training: %w", err)
	}
	last := history[len(history)-1]
	logf("trained %d epochs in %v: held-out -ELBO %.2f nats per image", len(history), took.Round(10*time.Millisecond), last.Validation)

	ckpt := filepath.Join(c.Out, "model.safetensors")
	if err := m.Save(ckpt); err != nil {
		return fmt.Errorf("parts: %w", err)
	}
	for _, fig := range []struct {
		name string
		draw func(context.Context, *vae.Model, *dataset.Set, config) (*figure, error)
	}{
		{"samples.png", samplesFigure},
		{"reconstructions.png", reconstructionsFigure},
		{"sweep.png", sweepFigure},
	} {
		f, err := fig.draw(ctx, m, test, c)
		if err != nil {
			return fmt.Errorf("parts: %s: %w", fig.name, err)
		}
		if err := f.save(filepath.Join(c.Out, fig.name)); err != nil {
			return fmt.Errorf("parts: %w", err)
		}
	}
	logf("wrote samples.png, reconstructions.png, sweep.png and model.safetensors to %s (total %v)", c.Out, since(start))
	return nil
}

func since(t time.Time) time.Duration { return time.Since(t).Round(10 * time.Millisecond) }

// Layout of the figures, in figure pixels.
const (
	margin    = 12 // around the figure
	gap       = 6  // between cells
	labelSize = 2  // magnification of row labels and titles
)

// labelColumn returns the width of a column that holds every part name.
func labelColumn() int {
	w := 0
	for p := range NumParts {
		w = max(w, textWidth(Part(p).String(), labelSize))
	}
	return w + 2*gap
}

// samplesFigure decodes c.Samples draws from the prior under every label:
// one row per part type, and the same z down each column, so a column
// shows one "style" rendered as every part.
func samplesFigure(ctx context.Context, m *vae.Model, _ *dataset.Set, c config) (*figure, error) {
	n := c.Samples
	z, err := m.SamplePrior(n, c.Seed)
	if err != nil {
		return nil, err
	}
	zs := mat.NewDense(n*NumParts, m.Latent(), nil)
	labels := make([]int, n*NumParts)
	for p := range NumParts {
		for j := range n {
			zs.SetRow(p*n+j, z.RawRowView(j))
			labels[p*n+j] = p
		}
	}
	x, err := m.Decode(ctx, zs, labels)
	if err != nil {
		return nil, err
	}
	cell := Side * c.Scale
	title := []string{"samples from the prior, decoded under each label", "(one row per label; the same z down each column)"}
	left := margin + labelColumn()
	top := margin + len(title)*(textHeight(labelSize)+gap) + gap
	f := newFigure(left+n*(cell+gap)+margin, top+NumParts*(cell+gap)+margin)
	for i, t := range title {
		f.text(margin, margin+i*(textHeight(labelSize)+gap), t, labelSize)
	}
	for p := range NumParts {
		y := top + p*(cell+gap)
		f.text(margin, y+(cell-textHeight(labelSize))/2, Part(p).String(), labelSize)
		for j := range n {
			f.cell(left+j*(cell+gap), y, x.RawRowView(p*n+j), c.Scale)
		}
	}
	return f, nil
}

// reconstructionsFigure shows held-out images beside their reconstructions
// (decoded posterior means), c.Pairs per part type.
func reconstructionsFigure(ctx context.Context, m *vae.Model, test *dataset.Set, c config) (*figure, error) {
	var idx []int
	count := make([]int, NumParts)
	for i := 0; i < test.Len(); i++ {
		if l := test.Label(i); count[l] < c.Pairs {
			idx = append(idx, i)
			count[l]++
		}
	}
	sub, err := test.Subset(idx)
	if err != nil {
		return nil, err
	}
	rec, err := m.Reconstruct(ctx, sub)
	if err != nil {
		return nil, err
	}
	cell := Side * c.Scale
	pairW := 2*cell + gap + 3*gap // a pair, then a wider gap
	title := "held-out images (in) and their reconstructions (out)"
	left := margin + labelColumn()
	head := margin + textHeight(labelSize) + gap
	top := head + textHeight(labelSize) + 2*gap
	f := newFigure(max(left+c.Pairs*pairW+margin, 2*margin+textWidth(title, labelSize)), top+NumParts*(cell+gap)+margin)
	f.text(margin, margin, title, labelSize)
	for j := range c.Pairs {
		x := left + j*pairW
		f.text(x+(cell-textWidth("in", labelSize))/2, head, "in", labelSize)
		f.text(x+cell+gap+(cell-textWidth("out", labelSize))/2, head, "out", labelSize)
	}
	col := make([]int, NumParts)
	for r, i := range idx {
		p := test.Label(i)
		y := top + p*(cell+gap)
		if col[p] == 0 {
			f.text(margin, y+(cell-textHeight(labelSize))/2, Part(p).String(), labelSize)
		}
		x := left + col[p]*pairW
		f.cell(x, y, sub.Row(r), c.Scale)
		f.cell(x+cell+gap, y, rec.RawRowView(r), c.Scale)
		col[p]++
	}
	return f, nil
}

// sweepDims returns the two latent dimensions the sweep varies: 0 and 1
// for a 2-D latent; otherwise the two with the largest mean KL on the
// held-out images (the dimensions the model uses most), largest first.
func sweepDims(ctx context.Context, m *vae.Model, test *dataset.Set, seed uint64) ([2]int, error) {
	if m.Latent() == 2 {
		return [2]int{0, 1}, nil
	}
	rep, err := m.Evaluate(ctx, test, vae.EvalOptions{K: 1, Seed: seed})
	if err != nil {
		return [2]int{}, err
	}
	if len(rep.KLPerDim) != m.Latent() {
		return [2]int{0, 1}, nil // the prior has no per-dimension KL
	}
	order := make([]int, m.Latent())
	for i := range order {
		order[i] = i
	}
	sort.SliceStable(order, func(a, b int) bool { return rep.KLPerDim[order[a]] > rep.KLPerDim[order[b]] })
	return [2]int{order[0], order[1]}, nil
}

// sweepFigure decodes the same Grid x Grid lattice of z under every label,
// one panel per label: one latent dimension runs left to right and another
// top to bottom, both over [-Span, Span] (see sweepDims); any further
// dimensions are 0.
func sweepFigure(ctx context.Context, m *vae.Model, test *dataset.Set, c config) (*figure, error) {
	g, d := c.Grid, m.Latent()
	dims, err := sweepDims(ctx, m, test, c.Seed)
	if err != nil {
		return nil, err
	}
	scale := max(1, c.Scale-1) // panels are many: one step smaller
	cell := Side * scale
	panel := g*cell + (g-1)*2 // cells 2 pixels apart
	zs := mat.NewDense(g*g*NumParts, d, nil)
	labels := make([]int, g*g*NumParts)
	for p := range NumParts {
		for r := range g {
			for q := range g {
				k := (p*g+r)*g + q
				zs.Set(k, dims[0], -c.Span+2*c.Span*float64(q)/float64(g-1))
				zs.Set(k, dims[1], -c.Span+2*c.Span*float64(r)/float64(g-1))
				labels[k] = p
			}
		}
	}
	x, err := m.Decode(ctx, zs, labels)
	if err != nil {
		return nil, err
	}
	title := []string{"latent sweep: the same grid of z decoded under every label"}
	if d == 2 {
		title = append(title, fmt.Sprintf("z1 from %g to %g left to right, z2 from %g to %g top to bottom", -c.Span, c.Span, -c.Span, c.Span))
	} else {
		title = append(title,
			fmt.Sprintf("z%d from %g to %g left to right, z%d from %g to %g top to bottom", dims[0]+1, -c.Span, c.Span, dims[1]+1, -c.Span, c.Span),
			fmt.Sprintf("(the two most used of %d latent dimensions; the others are 0)", d))
	}
	panelGap := 4 * gap
	head := margin + len(title)*(textHeight(labelSize)+gap) + gap
	top := head + textHeight(labelSize) + gap
	w := 2*margin + NumParts*panel + (NumParts-1)*panelGap
	for _, t := range title {
		w = max(w, 2*margin+textWidth(t, labelSize))
	}
	f := newFigure(w, top+panel+margin)
	for i, t := range title {
		f.text(margin, margin+i*(textHeight(labelSize)+gap), t, labelSize)
	}
	for p := range NumParts {
		x0 := margin + p*(panel+panelGap)
		name := Part(p).String()
		f.text(x0+(panel-textWidth(name, labelSize))/2, head, name, labelSize)
		for r := range g {
			for q := range g {
				k := (p*g+r)*g + q
				f.cell(x0+q*(cell+2), top+r*(cell+2), x.RawRowView(k), scale)
			}
		}
	}
	return f, nil
}
