package vae

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"gonum.org/v1/gonum/mat"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
	"lowerbound.dev/vae/dataset"
)

// checkSameModel fails unless b has a's parameters (names, order, shapes,
// bits), a's description and a's outputs, compared with ==.
func checkSameModel(t *testing.T, a, b *Model, data *dataset.Set) {
	t.Helper()
	ctx := context.Background()
	if a.Dtype() != b.Dtype() || a.Latent() != b.Latent() || a.Features() != b.Features() || a.Classes() != b.Classes() ||
		!slices.Equal(a.InputShape(), b.InputShape()) {
		t.Fatalf("loaded model: dtype %v, latent %d, features %d, classes %d, shape %v; saved %v, %d, %d, %d, %v",
			b.Dtype(), b.Latent(), b.Features(), b.Classes(), b.InputShape(), a.Dtype(), a.Latent(), a.Features(), a.Classes(), a.InputShape())
	}
	pa, pb := a.Params(), b.Params()
	if len(pa) != len(pb) {
		t.Fatalf("loaded model has %d parameters, saved %d", len(pb), len(pa))
	}
	for i := range pa {
		if pa[i].Name != pb[i].Name || !pa[i].Value.Shape().Eq(pb[i].Value.Shape()) {
			t.Fatalf("parameter %d: loaded %s %v, saved %s %v", i, pb[i].Name, pb[i].Value.Shape(), pa[i].Name, pa[i].Value.Shape())
		}
	}
	if ok, name := sameBits(a, paramBits(a), paramBits(b)); !ok {
		t.Fatalf("parameter %s differs after the round trip", name)
	}
	ra, err := a.Reconstruct(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	rb, err := b.Reconstruct(ctx, data)
	if err != nil {
		t.Fatal(err)
	}
	if !mat64Equal(ra.RawMatrix().Data, rb.RawMatrix().Data) {
		t.Error("Reconstruct differs after the round trip")
	}
	for _, k := range []int{1, 4} {
		sa, err := a.Score(ctx, data, ScoreOptions{K: k, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		sb, err := b.Score(ctx, data, ScoreOptions{K: k, Seed: 3})
		if err != nil {
			t.Fatal(err)
		}
		if !mat64Equal(sa, sb) {
			t.Errorf("Score(K=%d) differs after the round trip", k)
		}
	}
}

func mat64Equal(a, b []float64) bool { return slices.Equal(a, b) }

func TestSaveLoadRoundTrip(t *testing.T) {
	ctx := context.Background()
	for _, dt := range []tensor.Dtype{tensor.Float32, tensor.Float64} {
		t.Run(dt.String(), func(t *testing.T) {
			m, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8, 6}, Latent: 3, Activation: layers.Tanh, Dtype: dt, Seed: 2})
			if err != nil {
				t.Fatal(err)
			}
			data := binarySet(t, 20, 12, 2)
			// Train so the biases are not zero.
			if _, err := m.Train(ctx, data, TrainConfig{Epochs: 1, BatchSize: 5, LearnRate: 0.01, Seed: 1}); err != nil {
				t.Fatal(err)
			}
			extra := map[string]string{"standardizer": `{"mean":[0.5],"std":[2]}`, "note": "ünïcode ✓", "empty": ""}
			for k, v := range extra {
				if err := m.SetExtra(k, v); err != nil {
					t.Fatal(err)
				}
			}
			path := filepath.Join(t.TempDir(), "m.safetensors")
			if err := m.Save(path); err != nil {
				t.Fatalf("Save: %v", err)
			}
			got, err := Load(path)
			if err != nil {
				t.Fatalf("Load: %v", err)
			}
			checkSameModel(t, m, got, data)
			if e := got.Extra(); len(e) != len(extra) {
				t.Errorf("Extra after Load: %v, want %v", e, extra)
			} else {
				for k, v := range extra {
					if e[k] != v {
						t.Errorf("Extra[%q] = %q after Load, want %q", k, e[k], v)
					}
				}
			}
			// The file is plain safetensors: every parameter under its
			// name, in the model's dtype.
			f, err := safetensors.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			want := map[tensor.Dtype]string{tensor.Float32: "F32", tensor.Float64: "F64"}[dt]
			for _, p := range m.Params() {
				st, err := f.Tensor(p.Name)
				if err != nil || st.Dtype != want || !slices.Equal(st.Shape, []int(p.Value.Shape())) {
					t.Errorf("tensor %s in the file: %+v, %v", p.Name, st.Shape, err)
				}
			}
			// LoadWeights into a fresh model built the same way.
			fresh, err := NewMLP(MLPConfig{Input: 12, Hidden: []int{8, 6}, Latent: 3, Activation: layers.Tanh, Dtype: dt, Seed: 77})
			if err != nil {
				t.Fatal(err)
			}
			if err := fresh.LoadWeights(path); err != nil {
				t.Fatalf("LoadWeights: %v", err)
			}
			checkSameModel(t, m, fresh, data)
			if fresh.Extra()["note"] != extra["note"] {
				t.Errorf("LoadWeights did not take the metadata: %v", fresh.Extra())
			}
		})
	}
}

func TestSaveLoadConditionalAndLearnedParts(t *testing.T) {
	ctx := context.Background()
	lik, err := losses.NewLearnedGaussian("lik", 12, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	prior, err := priors.NewMixture("prior", 2, 3, priors.MixtureOptions{Dtype: tensor.Float64, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	models := map[string]func() (*Model, error){
		"conditional": func() (*Model, error) {
			return NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Classes: 3, Dtype: tensor.Float64, Seed: 5})
		},
		"learned likelihood and mixture prior": func() (*Model, error) {
			return NewMLP(MLPConfig{Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float64, Seed: 5, Likelihood: lik, Prior: prior})
		},
	}
	for name, build := range models {
		t.Run(name, func(t *testing.T) {
			m, err := build()
			if err != nil {
				t.Fatal(err)
			}
			data := binarySet(t, 9, 12, 3)
			if m.Classes() > 0 {
				data = withLabels(t, data, []int{0, 1, 2, 2, 1, 0, 0, 1, 2}, 3)
			}
			if _, err := m.Train(ctx, data, TrainConfig{Epochs: 2, BatchSize: 4, LearnRate: 0.01, Seed: 1}); err != nil {
				t.Fatal(err)
			}
			path := filepath.Join(t.TempDir(), "m.safetensors")
			if err := m.Save(path); err != nil {
				t.Fatal(err)
			}
			got, err := Load(path)
			if err != nil {
				t.Fatalf("Load: %v", err)
			}
			checkSameModel(t, m, got, data)
			if m.Classes() > 0 {
				z := mustPrior(t, m, 4)
				a, err := m.Decode(ctx, z, []int{0, 1, 2, 1})
				if err != nil {
					t.Fatal(err)
				}
				b, err := got.Decode(ctx, z, []int{0, 1, 2, 1})
				if err != nil {
					t.Fatal(err)
				}
				if !mat64Equal(a.RawMatrix().Data, b.RawMatrix().Data) {
					t.Error("conditional Decode differs after the round trip")
				}
			}
		})
	}
}

func mustPrior(t *testing.T, m *Model, n int) *mat.Dense {
	t.Helper()
	z, err := m.SamplePrior(n, 1)
	if err != nil {
		t.Fatal(err)
	}
	return z
}

// smallCheckpoint writes a small float32 model and returns its bytes.
func smallCheckpoint(t *testing.T, dir string) (string, []byte) {
	t.Helper()
	m, err := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, "small.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return path, b
}

// loadNoPanic calls Load and turns a panic into a test failure.
func loadNoPanic(t *testing.T, path, what string) (m *Model, err error) {
	t.Helper()
	defer func() {
		if r := recover(); r != nil {
			t.Fatalf("%s: Load panicked: %v", what, r)
		}
	}()
	return Load(path)
}

// isCheckpointError reports whether err is a bad-checkpoint error: every
// such error wraps ErrCheckpoint, whether the file reader or the model
// found the fault.
func isCheckpointError(err error) bool { return errors.Is(err, ErrCheckpoint) }

// A missing file is not a bad checkpoint: the caller sees the operating
// system's error.
func TestLoadMissingFile(t *testing.T) {
	_, err := Load(filepath.Join(t.TempDir(), "absent.safetensors"))
	if !errors.Is(err, os.ErrNotExist) || errors.Is(err, ErrCheckpoint) {
		t.Fatalf("Load of a missing file: %v; want os.ErrNotExist and not ErrCheckpoint", err)
	}
}

// A truncated file wraps both ErrCheckpoint and the reader's sentinel.
func TestLoadTruncatedWrapsReaderError(t *testing.T) {
	dir := t.TempDir()
	_, full := smallCheckpoint(t, dir)
	path := filepath.Join(dir, "cut.safetensors")
	if err := os.WriteFile(path, full[:len(full)-3], 0o644); err != nil {
		t.Fatal(err)
	}
	_, err := Load(path)
	if !errors.Is(err, ErrCheckpoint) || !errors.Is(err, safetensors.ErrTruncated) {
		t.Fatalf("Load of a truncated file: %v; want ErrCheckpoint and safetensors.ErrTruncated", err)
	}
}

func TestLoadTruncated(t *testing.T) {
	dir := t.TempDir()
	_, full := smallCheckpoint(t, dir)
	path := filepath.Join(dir, "cut.safetensors")
	target, err := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 9})
	if err != nil {
		t.Fatal(err)
	}
	before := paramBits(target)
	// Proper prefixes, from the empty file to one byte short: every length
	// near the start, the end of the header and the end of the file, and
	// every ninth length elsewhere (each costs a file write).
	hdrEnd := 8 + (int(full[0]) | int(full[1])<<8 | int(full[2])<<16)
	for n := 0; n < len(full); n++ {
		near := func(x int) bool { return n >= x-16 && n <= x+16 }
		if !(n < 32 || near(hdrEnd) || near(len(full)) || n%9 == 0) {
			continue
		}
		if err := os.WriteFile(path, full[:n], 0o644); err != nil {
			t.Fatal(err)
		}
		what := fmt.Sprintf("prefix of %d of %d bytes", n, len(full))
		m, err := loadNoPanic(t, path, what)
		if err == nil || m != nil {
			t.Fatalf("%s: Load gave model %v, error %v", what, m != nil, err)
		}
		if !isCheckpointError(err) {
			t.Fatalf("%s: error %v does not wrap ErrCheckpoint", what, err)
		}
		if err := target.LoadWeights(path); err == nil {
			t.Fatalf("%s: LoadWeights succeeded", what)
		}
	}
	if ok, name := sameBits(target, before, paramBits(target)); !ok {
		t.Errorf("failed LoadWeights calls changed parameter %s", name)
	}
	if _, err := Load(filepath.Join(dir, "missing.safetensors")); err == nil {
		t.Error("Load of a missing file succeeded")
	}
}

func TestLoadFlippedHeaderByte(t *testing.T) {
	dir := t.TempDir()
	_, full := smallCheckpoint(t, dir)
	hdrLen := int(full[0]) | int(full[1])<<8 | int(full[2])<<16 | int(full[3])<<24
	if hdrLen <= 0 || 8+hdrLen > len(full) || full[8] != '{' {
		t.Fatalf("fixture: header length %d of a %d-byte file", hdrLen, len(full))
	}
	header := full[8 : 8+hdrLen]
	at := func(s string) int {
		i := bytes.Index(header, []byte(s))
		if i < 0 {
			t.Fatalf("fixture: %q not in the header", s)
		}
		return 8 + i
	}
	critical := map[string]int{
		"header length, low byte":  0,
		"header length, high byte": 7,
		"opening brace":            8,
		"a tensor's dtype":         at(`"F32"`) + 2,
		"a tensor's data offset":   at(`"data_offsets":[`) + len(`"data_offsets":[`),
		"the format version":       at(`"lowerbound.format":"2"`) + len(`"lowerbound.format":"`),
		"a shape":                  at(`"shape":[`) + len(`"shape":[`),
	}
	path := filepath.Join(dir, "flipped.safetensors")
	for name, off := range critical {
		b := slices.Clone(full)
		b[off] ^= 0x01
		if err := os.WriteFile(path, b, 0o644); err != nil {
			t.Fatal(err)
		}
		m, err := loadNoPanic(t, path, name)
		if err == nil || m != nil {
			t.Errorf("%s (byte %d) flipped: Load succeeded", name, off)
		}
	}
	// One flipped bit in every fifth byte of the header: never a panic.
	for off := 0; off < 8+hdrLen; off += 5 {
		b := slices.Clone(full)
		b[off] ^= 0x20
		if err := os.WriteFile(path, b, 0o644); err != nil {
			t.Fatal(err)
		}
		if m, err := loadNoPanic(t, path, fmt.Sprintf("byte %d", off)); (m == nil) == (err == nil) {
			t.Fatalf("byte %d flipped: model %v with error %v", off, m != nil, err)
		}
	}
}

func TestLoadWeightsWrongArchitecture(t *testing.T) {
	dir := t.TempDir()
	a := smallMLP(t, 1)
	path := filepath.Join(dir, "a.safetensors")
	if err := a.Save(path); err != nil {
		t.Fatal(err)
	}
	others := map[string]MLPConfig{
		"narrower hidden layer": {Input: 12, Hidden: []int{6}, Latent: 3, Dtype: tensor.Float64},
		"more latent":           {Input: 12, Hidden: []int{8}, Latent: 4, Dtype: tensor.Float64},
		"extra hidden layer":    {Input: 12, Hidden: []int{8, 8}, Latent: 3, Dtype: tensor.Float64},
		"float32":               {Input: 12, Hidden: []int{8}, Latent: 3, Dtype: tensor.Float32},
		"conditional":           {Input: 12, Hidden: []int{8}, Latent: 3, Classes: 2, Dtype: tensor.Float64},
	}
	for name, cfg := range others {
		b, err := NewMLP(cfg)
		if err != nil {
			t.Fatal(err)
		}
		if err := b.SetExtra("keep", "me"); err != nil {
			t.Fatal(err)
		}
		before := paramBits(b)
		err = b.LoadWeights(path)
		wantErr(t, name, err, ErrCheckpoint)
		if ok, p := sameBits(b, before, paramBits(b)); !ok {
			t.Errorf("%s: the failed LoadWeights changed parameter %s", name, p)
		}
		if b.Extra()["keep"] != "me" {
			t.Errorf("%s: the failed LoadWeights changed the metadata: %v", name, b.Extra())
		}
	}
}

func TestSaveToMissingFolder(t *testing.T) {
	dir := t.TempDir()
	m := smallMLP(t, 1)
	path := filepath.Join(dir, "no", "such", "folder", "m.safetensors")
	if err := m.Save(path); err == nil {
		t.Fatal("Save into a missing folder succeeded")
	}
	if _, err := os.Stat(filepath.Join(dir, "no")); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("Save created %s (stat: %v)", filepath.Join(dir, "no"), err)
	}
	assertDirHolds(t, dir)
}

// opaque is a user-written layer: no Spec, so a checkpoint cannot
// describe it.
type opaque struct{ inner *layers.Dense }

func (o opaque) Forward(s *layers.Scope, x *G.Node) (*G.Node, error) { return o.inner.Forward(s, x) }
func (o opaque) Params() []*layers.Param                             { return o.inner.Params() }

func TestSaveUserWrittenPart(t *testing.T) {
	build := func(seed uint64) *Model {
		opt := f64Opt(seed)
		m, err := New(Config{InputShape: []int{12},
			Encoder: opaque{must(layers.NewDense("enc", 12, 8, opt))},
			Head:    must(layers.NewGaussianHead("head", 8, 3, opt)),
			Decoder: must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{3, 12}}, opt)),
			Dtype:   tensor.Float64})
		if err != nil {
			t.Fatal(err)
		}
		return m
	}
	a, b := build(1), build(2)
	path := filepath.Join(t.TempDir(), "user.safetensors")
	wantErr(t, "Save with a user-written layer", a.Save(path), ErrNotDescribed, "AllowWeightsOnly", "encoder")
	if _, err := os.Stat(path); !errors.Is(err, os.ErrNotExist) {
		t.Fatalf("the refused Save wrote %s (%v)", path, err)
	}
	if err := a.Save(path, AllowWeightsOnly()); err != nil {
		t.Fatalf("Save with a user-written layer and AllowWeightsOnly: %v", err)
	}
	m, err := Load(path)
	wantErr(t, "Load without a model description", err, ErrCheckpoint, "LoadWeights")
	if m != nil {
		t.Error("Load returned a model with the error")
	}
	if err := b.LoadWeights(path); err != nil {
		t.Fatalf("LoadWeights: %v", err)
	}
	checkSameModel(t, a, b, binarySet(t, 5, 12, 1))
}
