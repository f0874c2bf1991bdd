package vae

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"strings"
	"sync"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// rewrite writes f's tensors (edited by edit, if not nil) and metadata to a
// new file. If the metadata holds per-tensor SHA-256 digests (format 2,
// see checkpoint_format.md), they are recomputed from the written bytes,
// the way a careful writer in any language would, so that what a test
// exercises is the check it means to, not the checksum.
func rewrite(t *testing.T, path string, f *safetensors.File, meta map[string]string, edit func(name string, data []byte)) {
	t.Helper()
	ts := f.List()
	for i := range ts {
		ts[i].Data = slices.Clone(ts[i].Data)
		if edit != nil {
			edit(ts[i].Name, ts[i].Data)
		}
	}
	meta = resign(meta, ts)
	var buf bytes.Buffer
	if err := safetensors.Write(&buf, ts, meta); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
}

// resign recomputes the "lowerbound.sha256" metadata key, when present:
// a JSON object mapping each tensor name to the lowercase hex SHA-256
// (FIPS 180-4, computed with crypto/sha256) of its data bytes.
func resign(meta map[string]string, ts []safetensors.Tensor) map[string]string {
	if _, ok := meta["lowerbound.sha256"]; !ok {
		return meta
	}
	sums := map[string]string{}
	for _, t := range ts {
		s := sha256.Sum256(t.Data)
		sums[t.Name] = hex.EncodeToString(s[:])
	}
	b, _ := json.Marshal(sums)
	meta = maps2(meta)
	meta["lowerbound.sha256"] = string(b)
	return meta
}

func maps2(m map[string]string) map[string]string {
	out := make(map[string]string, len(m))
	for k, v := range m {
		out[k] = v
	}
	return out
}

// editDescription returns meta with the model description decoded into a
// generic JSON value, changed by edit, and encoded again.
func editDescription(t *testing.T, meta map[string]string, edit func(d map[string]any)) map[string]string {
	t.Helper()
	var d map[string]any
	if err := json.Unmarshal([]byte(meta["lowerbound.model"]), &d); err != nil {
		t.Fatal(err)
	}
	edit(d)
	b, err := json.Marshal(d)
	if err != nil {
		t.Fatal(err)
	}
	meta = maps2(meta)
	meta["lowerbound.model"] = string(b)
	return meta
}

// setConfig sets key in the config of the layer spec at d[part].
func setConfig(d map[string]any, part, key string, v any) {
	d[part].(map[string]any)["config"].(map[string]any)[key] = v
}

// allocated returns the bytes fn allocates (runtime.MemStats.TotalAlloc).
func allocated(fn func()) uint64 {
	var a, b runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&a)
	fn()
	runtime.ReadMemStats(&b)
	return b.TotalAlloc - a.TotalAlloc
}

// Issue 8, item 4: a small file whose description claims hidden layers of
// a million units must fail before anything that size is allocated.
// Loading the honest 4-3-2 model costs a few hundred kilobytes; the bound
// of 8 MiB is far below the ~50 MB that building the claimed layers takes.
func TestLoadChecksDescriptionBeforeBuilding(t *testing.T) {
	dir := t.TempDir()
	path, _ := smallCheckpoint(t, dir)
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	const wide = 1_000_000
	meta := editDescription(t, f.Metadata, func(d map[string]any) {
		setConfig(d, "encoder", "sizes", []int{4, wide})
		setConfig(d, "head", "in", wide)
		setConfig(d, "decoder", "sizes", []int{2, wide, 4})
	})
	bad := filepath.Join(dir, "wide.safetensors")
	rewrite(t, bad, f, meta, nil)
	if fi, _ := os.Stat(bad); fi.Size() > 4096 {
		t.Fatalf("fixture: %d bytes", fi.Size())
	}
	honest := allocated(func() {
		if _, err := Load(path); err != nil {
			t.Fatal(err)
		}
	})
	var m *Model
	got := allocated(func() { m, err = Load(bad) })
	wantErr(t, "Load of a description wider than its tensors", err, ErrCheckpoint, "encoder.0.weight")
	if m != nil {
		t.Error("Load returned a model with the error")
	}
	if got > 8<<20 {
		t.Errorf("Load allocated %d bytes for a %d-byte file (the honest file: %d)", got, len(meta["lowerbound.model"]), honest)
	}
	t.Logf("Load allocated %d bytes for the wide claim, %d for the honest file", got, honest)
}

// Issue 8, item 5: flipping any single bit of the tensor data (all 1792 of
// them; one per byte with -short) is caught by Load and LoadWeights (the
// SHA-256 digests), and the model is left as it was.
func TestLoadRejectsFlippedDataBits(t *testing.T) {
	dir := t.TempDir()
	path, full := smallCheckpoint(t, dir)
	hdrLen := int(full[0]) | int(full[1])<<8 | int(full[2])<<16 | int(full[3])<<24
	start := 8 + hdrLen
	target, err := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 9})
	if err != nil {
		t.Fatal(err)
	}
	before := paramBits(target)
	flipped := filepath.Join(dir, "flipped.safetensors")
	loaded := 0
	total := 0
	for off := start; off < len(full); off++ {
		for bit := range 8 {
			if bit != off%8 && testing.Short() {
				continue // -short: one bit per byte; otherwise every bit
			}
			b := slices.Clone(full)
			b[off] ^= 1 << bit
			total++
			// Load and LoadWeights through files for one bit per byte, the
			// io.Reader variants (same checks, no file writes) for the rest.
			var m *Model
			var err, werr error
			if bit == off%8 {
				if err := os.WriteFile(flipped, b, 0o644); err != nil {
					t.Fatal(err)
				}
				m, err = loadNoPanic(t, flipped, fmt.Sprintf("byte %d bit %d", off, bit))
				werr = target.LoadWeights(flipped)
			} else {
				m, err = LoadFrom(bytes.NewReader(b))
				werr = target.LoadWeightsFrom(bytes.NewReader(b))
			}
			if err == nil || m != nil {
				loaded++
				continue
			}
			wantErr(t, "Load of flipped data", err, ErrCheckpoint, "tensor")
			if werr == nil {
				t.Fatalf("byte %d bit %d: LoadWeights succeeded", off, bit)
			}
		}
	}
	if loaded > 0 {
		t.Errorf("%d of %d single-bit flips in the tensor data loaded", loaded, total)
	}
	if ok, name := sameBits(target, before, paramBits(target)); !ok {
		t.Errorf("failed LoadWeights calls changed parameter %s", name)
	}
	_ = path
}

// Issue 8, item 5: a file whose weights are not finite (with a correct
// checksum, so that only the value check can catch it) is refused by Load
// and LoadWeights with an error naming the tensor.
func TestLoadRejectsNonFiniteWeights(t *testing.T) {
	dir := t.TempDir()
	path, _ := smallCheckpoint(t, dir)
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	for _, v := range []float32{float32(math.NaN()), float32(math.Inf(1)), float32(math.Inf(-1))} {
		bad := filepath.Join(dir, "nan.safetensors")
		rewrite(t, bad, f, f.Metadata, func(name string, data []byte) {
			if name == "decoder.0.bias" {
				u := math.Float32bits(v)
				data[4], data[5], data[6], data[7] = byte(u), byte(u>>8), byte(u>>16), byte(u>>24)
			}
		})
		m, err := Load(bad)
		wantErr(t, fmt.Sprintf("Load with %v in a weight", v), err, ErrCheckpoint, `"decoder.0.bias"`, "element 1")
		if m != nil {
			t.Error("Load returned a model with the error")
		}
		target, _ := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 9})
		wantErr(t, fmt.Sprintf("LoadWeights with %v in a weight", v), target.LoadWeights(bad), ErrCheckpoint, `"decoder.0.bias"`)
	}
}

// Issue 8, item 13: the model description is decoded strictly and every
// field is checked against the others and the tensors.
func TestLoadDescriptionStrict(t *testing.T) {
	dir := t.TempDir()
	path, _ := smallCheckpoint(t, dir)
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	raw := f.Metadata["lowerbound.model"]
	cases := map[string]map[string]string{
		"unknown top-level key": editDescription(t, f.Metadata, func(d map[string]any) { d["hidden_units"] = 7 }),
		"unknown prior key":     editDescription(t, f.Metadata, func(d map[string]any) { d["prior"].(map[string]any)["scale"] = 2 }),
		"unknown likelihood key": editDescription(t, f.Metadata, func(d map[string]any) {
			d["likelihood"].(map[string]any)["temperature"] = 2
		}),
		"latent differs from the head": editDescription(t, f.Metadata, func(d map[string]any) { d["latent"] = 7 }),
		"latent zero":                  editDescription(t, f.Metadata, func(d map[string]any) { d["latent"] = 0 }),
		"prior dimension differs":      editDescription(t, f.Metadata, func(d map[string]any) { d["prior"].(map[string]any)["dim"] = 3 }),
		"input shape differs":          editDescription(t, f.Metadata, func(d map[string]any) { d["input_shape"] = []int{2, 2} }),
		"negative classes":             editDescription(t, f.Metadata, func(d map[string]any) { d["classes"] = -1 }),
		"classes beyond MaxFeatures":   editDescription(t, f.Metadata, func(d map[string]any) { d["classes"] = 1 << 40 }),
		"input beyond MaxFeatures":     editDescription(t, f.Metadata, func(d map[string]any) { d["input_shape"] = []int{1, 1 << 20, 1 << 20} }),
		"dtype differs from tensors":   editDescription(t, f.Metadata, func(d map[string]any) { d["dtype"] = "float64" }),
		"duplicate key":                withDescription(f.Metadata, strings.Replace(raw, `"latent":2`, `"latent":2,"latent":2`, 1)),
		"trailing data":                withDescription(f.Metadata, raw+` {}`),
		"null encoder":                 editDescription(t, f.Metadata, func(d map[string]any) { d["encoder"] = nil }),
	}
	if !strings.Contains(raw, `"latent":2`) {
		t.Fatalf("fixture: %s", raw)
	}
	bad := filepath.Join(dir, "bad.safetensors")
	for name, meta := range cases {
		rewrite(t, bad, f, meta, nil)
		m, err := loadNoPanic(t, bad, name)
		wantErr(t, name, err, ErrCheckpoint)
		if m != nil {
			t.Errorf("%s: Load returned a model", name)
		}
	}
}

func withDescription(meta map[string]string, desc string) map[string]string {
	meta = maps2(meta)
	meta["lowerbound.model"] = desc
	return meta
}

// Issue 8, item 16: a model with a user-written part is refused by Save
// at save time (not at Load, in production), also when the part hides
// inside a Sequential.
func TestSaveRefusesUndescribedPartAtSaveTime(t *testing.T) {
	opt := f64Opt(1)
	inner := must(layers.NewDense("enc.1", 8, 8, opt))
	cases := map[string]layers.Layer{
		"user layer": opaque{must(layers.NewDense("enc", 12, 8, opt))},
		"user layer inside a sequential": must(layers.NewSequential("enc",
			must(layers.NewDense("enc.0", 12, 8, opt)), opaque{inner})),
	}
	for name, enc := range cases {
		m, err := New(Config{InputShape: []int{12}, Encoder: enc,
			Head:    must(layers.NewGaussianHead("head", 8, 3, opt)),
			Decoder: must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{3, 12}}, opt)),
			Dtype:   tensor.Float64})
		if err != nil {
			t.Fatal(err)
		}
		path := filepath.Join(t.TempDir(), "user.safetensors")
		if err := m.Save(path); err == nil {
			t.Errorf("%s: Save succeeded; the file can only be read with LoadWeights and nothing said so", name)
		} else {
			wantErr(t, name, err, ErrNotDescribed, "LoadWeights", "AllowWeightsOnly")
		}
		var buf bytes.Buffer
		wantErr(t, name+" (SaveTo)", m.SaveTo(&buf), ErrNotDescribed)
		if err := m.Save(path, AllowWeightsOnly()); err != nil {
			t.Errorf("%s: Save with AllowWeightsOnly: %v", name, err)
		}
		back := must(New(Config{InputShape: []int{12}, Encoder: enc,
			Head:    must(layers.NewGaussianHead("head", 8, 3, opt)),
			Decoder: must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{3, 12}}, opt)),
			Dtype:   tensor.Float64}))
		if err := back.LoadWeights(path); err != nil {
			t.Errorf("%s: LoadWeights of the weights-only file: %v", name, err)
		}
	}
}

// Issue 8, item 9: Save, Score and LoadWeights run at the same time (the
// docs call inference and LoadWeights safe together). Run with -race. Each
// file Save writes must be byte for byte one of the two checkpoints that
// LoadWeights alternates between, and each score one of their two scores.
func TestConcurrentSaveScoreLoadWeights(t *testing.T) {
	dir := t.TempDir()
	ctx := context.Background()
	data := binarySet(t, 6, 12, 4)
	files := make([]string, 2)
	want := make([][]byte, 2)
	scores := make([][]float64, 2)
	for i := range 2 {
		a := smallMLP(t, uint64(i+1))
		files[i] = filepath.Join(dir, fmt.Sprintf("m%d.safetensors", i))
		if err := a.Save(files[i]); err != nil {
			t.Fatal(err)
		}
		var err error
		if want[i], err = os.ReadFile(files[i]); err != nil {
			t.Fatal(err)
		}
		if scores[i], err = a.Score(ctx, data, ScoreOptions{K: 2, Seed: 1}); err != nil {
			t.Fatal(err)
		}
	}
	m := smallMLP(t, 1)
	const rounds = 20
	var wg sync.WaitGroup
	errc := make(chan error, 3*rounds)
	wg.Add(3)
	go func() {
		defer wg.Done()
		for i := range rounds {
			if err := m.LoadWeights(files[i%2]); err != nil {
				errc <- err
			}
		}
	}()
	go func() {
		defer wg.Done()
		for range rounds {
			s, err := m.Score(ctx, data, ScoreOptions{K: 2, Seed: 1})
			if err != nil {
				errc <- err
			} else if !slices.Equal(s, scores[0]) && !slices.Equal(s, scores[1]) {
				errc <- fmt.Errorf("a score is neither model's: %v", s)
			}
		}
	}()
	go func() {
		defer wg.Done()
		for i := range rounds {
			p := filepath.Join(dir, fmt.Sprintf("save%d.safetensors", i))
			if err := m.Save(p); err != nil {
				errc <- err
				continue
			}
			b, err := os.ReadFile(p)
			if err != nil {
				errc <- err
			} else if !bytes.Equal(b, want[0]) && !bytes.Equal(b, want[1]) {
				errc <- fmt.Errorf("save %d wrote a mix of the two models", i)
			}
		}
	}()
	wg.Wait()
	close(errc)
	for err := range errc {
		t.Error(err)
	}
}

// Training with CheckpointPath on a model that Save cannot describe fails
// before the first step (not after the first improved epoch), naming the
// field; with AllowWeightsOnly in SaveOptions the checkpoint is written.
func TestTrainCheckpointNeedsDescribableModel(t *testing.T) {
	opt := f64Opt(1)
	m := must(New(Config{InputShape: []int{12}, Encoder: opaque{must(layers.NewDense("enc", 12, 8, opt))},
		Head:       must(layers.NewGaussianHead("head", 8, 3, opt)),
		Decoder:    must(layers.NewMLP("dec", layers.MLPConfig{Sizes: []int{3, 12}}, opt)),
		Likelihood: losses.Gaussian{Sigma: 1},
		Dtype:      tensor.Float64}))
	data := realSet(t, 20, 12, 3)
	path := filepath.Join(t.TempDir(), "user.safetensors")
	steps := 0
	cfg := TrainConfig{Epochs: 1, BatchSize: 10, Seed: 1, CheckpointPath: path, OnStep: func(StepInfo) { steps++ }}
	_, err := m.Train(context.Background(), data, cfg)
	wantErr(t, "Train without SaveOptions", err, ErrConfig, "CheckpointPath", "AllowWeightsOnly")
	if !errors.Is(err, ErrNotDescribed) {
		t.Errorf("Train error %v does not wrap ErrNotDescribed", err)
	}
	if steps != 0 {
		t.Errorf("Train ran %d steps before refusing the checkpoint path", steps)
	}
	cfg.SaveOptions = []SaveOption{AllowWeightsOnly()}
	if _, err := m.Train(context.Background(), data, cfg); err != nil {
		t.Fatalf("Train with AllowWeightsOnly: %v", err)
	}
	if _, err := os.Stat(path); err != nil {
		t.Errorf("no checkpoint written: %v", err)
	}
}
