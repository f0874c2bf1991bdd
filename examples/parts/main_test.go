package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"image"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"

	"lowerbound.dev/vae"
)

// tinyConfig is a configuration small enough to run in about a second.
func tinyConfig(dir string) config {
	c := defaultConfig()
	c.Out = dir
	c.Epochs = 1
	c.Train = 40
	c.Test = 10
	c.Channels = 2
	c.Hidden = 8
	c.Batch = 20
	c.Samples = 3
	c.Pairs = 2
	c.Grid = 3
	c.Scale = 2
	return c
}

func readPNG(t *testing.T, path string) image.Image {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return img
}

// TestRunSmoke runs the whole program on a tiny configuration and checks
// its outputs: the figures decode as PNGs of the sizes their layouts call
// for, the checkpoint reloads as the conditional model that was described,
// and the reloaded model reproduces the pixels of samples.png.
func TestRunSmoke(t *testing.T) {
	for _, latent := range []int{2, 3} { // 3 exercises the choice of swept dimensions
		dir := t.TempDir()
		c := tinyConfig(dir)
		c.Latent = latent
		var log bytes.Buffer
		c.Log, c.Progress = &log, &log
		if err := run(context.Background(), c); err != nil {
			t.Fatalf("latent %d: %v", latent, err)
		}
		if !strings.Contains(log.String(), "epoch 1/1") {
			t.Errorf("latent %d: the log has no epoch line:\n%s", latent, log.String())
		}

		// Sizes from the layouts in run.go: margins around, a label column
		// on the left, title lines on top, cells of Side*Scale pixels
		// separated by gaps.
		th := textHeight(labelSize)
		cell := Side * c.Scale
		titleLines := func(n int) int { return n * (th + gap) }
		want := map[string]image.Point{
			"samples.png": {
				X: margin + labelColumn() + c.Samples*(cell+gap) + margin,
				Y: margin + titleLines(2) + gap + NumParts*(cell+gap) + margin,
			},
			"reconstructions.png": {
				X: max(margin+labelColumn()+c.Pairs*(2*cell+4*gap)+margin,
					2*margin+textWidth("held-out images (in) and their reconstructions (out)", labelSize)),
				Y: margin + titleLines(1) + th + 2*gap + NumParts*(cell+gap) + margin,
			},
		}
		sweepCell := Side * (c.Scale - 1)
		panel := c.Grid*sweepCell + (c.Grid-1)*2
		sweepTitles := 2
		if latent > 2 {
			sweepTitles = 3
		}
		// sweep.png: the height is fixed by the layout; the width is that
		// of the panels unless a title line is wider (titles are at most
		// 70 characters).
		panels := 2*margin + NumParts*panel + (NumParts-1)*4*gap
		want["sweep.png"] = image.Point{X: -1, Y: margin + titleLines(sweepTitles) + gap + th + gap + panel + margin}
		imgs := map[string]image.Image{}
		for name, size := range want {
			img := readPNG(t, filepath.Join(dir, name))
			got := img.Bounds().Size()
			if size.X == -1 { // sweep.png
				if got.X < panels || got.X > max(panels, 2*margin+textWidth(strings.Repeat("x", 70), labelSize)) || got.Y != size.Y {
					t.Errorf("latent %d: %s is %v, want height %d and width from %d", latent, name, got, size.Y, panels)
				}
			} else if got != size {
				t.Errorf("latent %d: %s is %v, want %v", latent, name, got, size)
			}
			imgs[name] = img
		}

		m, err := vae.Load(filepath.Join(dir, "model.safetensors"))
		if err != nil {
			t.Fatalf("latent %d: %v", latent, err)
		}
		if m.Classes() != NumParts || m.Latent() != latent || !slices.Equal(m.InputShape(), []int{1, Side, Side}) {
			t.Errorf("latent %d: reloaded model has %d classes, latent %d, input %v", latent, m.Classes(), m.Latent(), m.InputShape())
		}
		if got := m.Extra()["parts.labels"]; got != "washer,hex nut,bracket,gear,spring" {
			t.Errorf("latent %d: parts.labels = %q", latent, got)
		}

		// samples.png shows Decode(SamplePrior(Samples, Seed)) under every
		// label; the reloaded model must give the same pixels, to the
		// 8-bit grey levels of the PNG (half a level of rounding).
		z, err := m.SamplePrior(c.Samples, c.Seed)
		if err != nil {
			t.Fatal(err)
		}
		top := margin + titleLines(2) + gap
		left := margin + labelColumn()
		for p := range NumParts {
			labels := slices.Repeat([]int{p}, c.Samples)
			x, err := m.Decode(context.Background(), z, labels)
			if err != nil {
				t.Fatal(err)
			}
			worst := 0.0
			for j := range c.Samples {
				for i := 0; i < Side*Side; i++ {
					px := left + j*(cell+gap) + (i%Side)*c.Scale
					py := top + p*(cell+gap) + (i/Side)*c.Scale
					r, _, _, _ := imgs["samples.png"].At(px, py).RGBA()
					shown := 1 - float64(r>>8)/255
					worst = max(worst, math.Abs(shown-x.At(j, i)))
				}
			}
			if worst > 0.5/255+1e-6 {
				t.Errorf("latent %d, %s: samples.png differs from the reloaded model's decoding by %.4f", latent, Part(p), worst)
			}
		}
	}
}

// TestReconstructionsShowHeldOut checks that reconstructions.png shows the
// held-out images themselves in its "in" cells.
func TestReconstructionsShowHeldOut(t *testing.T) {
	dir := t.TempDir()
	c := tinyConfig(dir)
	if err := run(context.Background(), c); err != nil {
		t.Fatal(err)
	}
	img := readPNG(t, filepath.Join(dir, "reconstructions.png"))
	test, err := makeSet(c.Test, c.Seed, c.Train)
	if err != nil {
		t.Fatal(err)
	}
	cell := Side * c.Scale
	top := margin + textHeight(labelSize) + gap + textHeight(labelSize) + 2*gap
	left := margin + labelColumn()
	// the first held-out image of each type is the first "in" cell of its row
	for p := range NumParts {
		first := -1
		for i := 0; i < test.Len(); i++ {
			if test.Label(i) == p {
				first = i
				break
			}
		}
		row := test.Row(first)
		for i := 0; i < Side*Side; i++ {
			r, _, _, _ := img.At(left+(i%Side)*c.Scale, top+p*(cell+gap)+(i/Side)*c.Scale).RGBA()
			if d := math.Abs(1 - float64(r>>8)/255 - row[i]); d > 0.5/255+1e-6 {
				t.Fatalf("%s: pixel %d shows %v, the held-out image has %v", Part(p), i, 1-float64(r>>8)/255, row[i])
			}
		}
	}
}

func TestRunStopsWhenCancelled(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	err := run(ctx, tinyConfig(t.TempDir()))
	if !errors.Is(err, context.Canceled) {
		t.Errorf("run with a cancelled context: %v, want context.Canceled", err)
	}
}

func TestRunRejectsBadConfig(t *testing.T) {
	for name, edit := range map[string]func(*config){
		"epochs":  func(c *config) { c.Epochs = 0 },
		"train":   func(c *config) { c.Train = NumParts - 1 },
		"latent":  func(c *config) { c.Latent = 1 },
		"scale":   func(c *config) { c.Scale = 0 },
		"span":    func(c *config) { c.Span = math.NaN() },
		"out":     func(c *config) { c.Out = "" },
		"lr":      func(c *config) { c.LearnRate = -1 },
		"grid":    func(c *config) { c.Grid = 1 },
		"samples": func(c *config) { c.Samples = 0 },
	} {
		c := tinyConfig(t.TempDir())
		edit(&c)
		err := run(context.Background(), c)
		if err == nil || !strings.Contains(err.Error(), "-"+name) {
			t.Errorf("%s: run gave %v, want an error naming -%s", name, err, name)
		}
	}
}

func TestParseFlags(t *testing.T) {
	var out bytes.Buffer
	if _, err := parseFlags([]string{"-h"}, &out); err != flag.ErrHelp {
		t.Errorf("-h: %v, want flag.ErrHelp", err)
	}
	help := out.String()
	if !strings.HasPrefix(help, "Usage: parts") {
		t.Errorf("help does not start with the usage header:\n%s", help)
	}
	for _, f := range []string{"out", "seed", "epochs", "train", "test", "latent", "channels", "hidden", "batch", "lr", "samples", "pairs", "grid", "span", "scale"} {
		if !strings.Contains(help, "  -"+f) {
			t.Errorf("help does not explain -%s", f)
		}
	}

	c, err := parseFlags([]string{"-out", "x", "-seed", "9", "-epochs", "3", "-latent", "4"}, &out)
	if err != nil {
		t.Fatal(err)
	}
	if c.Out != "x" || c.Seed != 9 || c.Epochs != 3 || c.Latent != 4 || c.Train != defaultConfig().Train {
		t.Errorf("parsed %+v", c)
	}
	for _, args := range [][]string{{"-epochs", "0"}, {"-latent", "1"}, {"stray"}, {"-nosuchflag"}} {
		out.Reset()
		if _, err := parseFlags(args, &out); err == nil {
			t.Errorf("%q: no error", args)
		} else if out.Len() == 0 {
			t.Errorf("%q: nothing printed", args)
		}
	}
}

// TestDefaultModelShapes checks that the default model accepts the
// generator's images and maps latent rows to whole images.
func TestDefaultModelShapes(t *testing.T) {
	m, err := buildModel(defaultConfig())
	if err != nil {
		t.Fatal(err)
	}
	set, err := makeSet(NumParts, 1, 0)
	if err != nil {
		t.Fatal(err)
	}
	rec, err := m.Reconstruct(context.Background(), set)
	if err != nil {
		t.Fatal(err)
	}
	if r, c := rec.Dims(); r != NumParts || c != Side*Side {
		t.Errorf("reconstructions are %dx%d, want %dx%d", r, c, NumParts, Side*Side)
	}
	x, err := m.Decode(context.Background(), mat.NewDense(1, m.Latent(), nil), []int{int(Gear)})
	if err != nil {
		t.Fatal(err)
	}
	for i, v := range x.RawRowView(0) {
		if !(v >= 0 && v <= 1) {
			t.Fatalf("decoded pixel %d is %v, want a probability", i, v)
		}
	}
}
