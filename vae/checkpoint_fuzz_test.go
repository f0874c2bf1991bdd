package vae

import (
	"bytes"
	"encoding/json"
	"errors"
	"math"
	"runtime"
	"slices"
	"strings"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
	"lowerbound.dev/priors"
)

// The fuzz targets below run their seeds in every `go test`; CI runs each
// for a few seconds with -fuzz, and DEVELOPERS.md gives the long run.
//
// Each asserts that the call never panics, that an accepted checkpoint is
// a usable model, and that memory stays within fuzzAllocBound of the
// input's size: what any input may cost.

// fuzzMaxFeatures is the MaxFeatures the targets pass, so that the bound
// below is tight (the default allows one 32 MB record).
const fuzzMaxFeatures = 1 << 12

// fuzzAllocBound is the most an input of n bytes may make Load allocate:
// 16 MiB (graph building, one record of fuzzMaxFeatures values, a small
// model's copies) plus 1 KiB per input byte (every tensor byte is copied a
// few times; every byte of description builds at most a few graph nodes).
func fuzzAllocBound(n int) uint64 { return 16<<20 + 1024*uint64(n) }

// fuzzSeeds returns valid checkpoints and the bad inputs of issue 8 built
// from them: a description claiming layers a million wide, flipped data
// bits, a NaN weight, unknown and duplicate keys, a wrong latent size,
// a format 1 file and a weights-only one.
func fuzzSeeds(t testing.TB) [][]byte {
	var out [][]byte
	save := func(m *Model, opts ...SaveOption) []byte {
		var buf bytes.Buffer
		if err := m.SaveTo(&buf, opts...); err != nil {
			t.Fatal(err)
		}
		return buf.Bytes()
	}
	small, err := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	lik, _ := losses.NewLearnedGaussian("lik", 6, tensor.Float64)
	prior, _ := priors.NewMixture("prior", 2, 2, priors.MixtureOptions{Dtype: tensor.Float64, Seed: 1})
	rich, err := NewMLP(MLPConfig{Input: 6, Hidden: []int{4}, Latent: 2, Classes: 2, Dtype: tensor.Float64, Seed: 2, Likelihood: lik, Prior: prior})
	if err != nil {
		t.Fatal(err)
	}
	valid := save(small)
	out = append(out, valid, save(rich), save(small, AllowWeightsOnly()), nil, valid[:len(valid)/2])
	f, err := safetensors.ReadBytes(valid)
	if err != nil {
		t.Fatal(err)
	}
	write := func(meta map[string]string, edit func(string, []byte)) []byte {
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
		return buf.Bytes()
	}
	desc := func(edit func(d map[string]any)) map[string]string {
		var d map[string]any
		if err := json.Unmarshal([]byte(f.Metadata[metaModel]), &d); err != nil {
			t.Fatal(err)
		}
		edit(d)
		b, _ := json.Marshal(d)
		meta := maps2(f.Metadata)
		meta[metaModel] = string(b)
		return meta
	}
	out = append(out,
		write(desc(func(d map[string]any) {
			setConfig(d, "encoder", "sizes", []int{4, 1_000_000})
			setConfig(d, "head", "in", 1_000_000)
			setConfig(d, "decoder", "sizes", []int{2, 1_000_000, 4})
		}), nil),
		write(desc(func(d map[string]any) { d["input_shape"] = []int{1, 1 << 30, 1 << 30} }), nil),
		write(desc(func(d map[string]any) { d["classes"] = 1 << 40 }), nil),
		write(desc(func(d map[string]any) { d["latent"] = 7 }), nil),
		write(desc(func(d map[string]any) { d["surprise"] = true }), nil),
		write(withDescription(f.Metadata, strings.Replace(f.Metadata[metaModel], `"latent":2`, `"latent":2,"latent":3`, 1)), nil),
		write(f.Metadata, func(name string, b []byte) {
			if name == "decoder.0.bias" {
				copy(b, []byte{0, 0, 0xc0, 0x7f}) // float32 NaN
			}
		}),
	)
	flipped := slices.Clone(valid)
	flipped[len(flipped)-5] ^= 0x10
	out = append(out, flipped)
	// Format 1: no digests, no transforms.
	v1 := maps2(f.Metadata)
	v1[metaFormat] = formatV1
	delete(v1, metaSHA256)
	var d map[string]any
	_ = json.Unmarshal([]byte(v1[metaModel]), &d)
	delete(d, "transforms")
	b, _ := json.Marshal(d)
	v1[metaModel] = string(b)
	out = append(out, write(v1, nil))
	return out
}

// measure runs fn and returns the bytes it allocated. The fuzzing engine
// runs one input at a time per process, so the process-wide count is fn's.
func measure(fn func()) uint64 {
	var a, b runtime.MemStats
	runtime.ReadMemStats(&a)
	fn()
	runtime.ReadMemStats(&b)
	return b.TotalAlloc - a.TotalAlloc
}

// FuzzLoad feeds arbitrary bytes to LoadFrom.
func FuzzLoad(f *testing.F) {
	for _, s := range fuzzSeeds(f) {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		var (
			m   *Model
			err error
		)
		got := measure(func() { m, err = LoadFrom(bytes.NewReader(data), MaxFeatures(fuzzMaxFeatures)) })
		if got > fuzzAllocBound(len(data)) {
			t.Fatalf("LoadFrom allocated %d bytes for %d input bytes (bound %d)", got, len(data), fuzzAllocBound(len(data)))
		}
		if (m == nil) == (err == nil) {
			t.Fatalf("model %v with error %v", m != nil, err)
		}
		if err != nil {
			return
		}
		// An accepted file is a usable model: it saves to a file that
		// loads again.
		var buf bytes.Buffer
		if err := m.SaveTo(&buf); err != nil {
			t.Fatalf("SaveTo of a loaded model: %v", err)
		}
		if _, err := LoadFrom(&buf, MaxFeatures(fuzzMaxFeatures)); err != nil {
			t.Fatalf("reload of a loaded model: %v", err)
		}
	})
}

// FuzzLoadWeights feeds arbitrary bytes to LoadWeightsFrom on a fixed
// model: on error the model is unchanged; on success every weight is
// finite.
func FuzzLoadWeights(f *testing.F) {
	for _, s := range fuzzSeeds(f) {
		f.Add(s)
	}
	m, err := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 5})
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		before := paramBits(m)
		var err error
		got := measure(func() { err = m.LoadWeightsFrom(bytes.NewReader(data)) })
		if got > fuzzAllocBound(len(data)) {
			t.Fatalf("LoadWeightsFrom allocated %d bytes for %d input bytes", got, len(data))
		}
		if err != nil {
			if ok, name := sameBits(m, before, paramBits(m)); !ok {
				t.Fatalf("a failed LoadWeightsFrom changed %s: %v", name, err)
			}
			if !errors.Is(err, ErrCheckpoint) {
				t.Fatalf("error %v does not wrap ErrCheckpoint", err)
			}
			return
		}
		for _, v := range flatParams(m) {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				t.Fatalf("LoadWeightsFrom accepted a non-finite weight")
			}
		}
	})
}

// FuzzModelDescription feeds arbitrary model descriptions to the decoder
// and, when they decode, builds a file whose tensors have the shapes the
// description implies (zeros, up to 64k values) and loads it: this reaches
// the builders with descriptions that agree with their tensors.
func FuzzModelDescription(f *testing.F) {
	for _, s := range fuzzSeeds(f) {
		if file, err := safetensors.ReadBytes(s); err == nil && file.Metadata[metaModel] != "" {
			f.Add(file.Metadata[metaModel])
		}
	}
	f.Add(`{"input_shape":[1,4,4],"dtype":"float32","latent":2,` +
		`"encoder":{"kind":"sequential","config":{"name":"enc","layers":[{"kind":"conv2d","config":{"name":"enc.c","in":1,"out":2,"kernel":[3,3],"stride":[1,1],"padding":[1,1],"activation":"elu"}},{"kind":"flatten","config":{"name":"f"}}]}},` +
		`"head":{"kind":"gaussian_head","config":{"name":"head","in":32,"latent":2}},` +
		`"decoder":{"kind":"sequential","config":{"name":"dec","layers":[{"kind":"dense","config":{"name":"dec.d","in":2,"out":4}},{"kind":"reshape","config":{"name":"r","shape":[1,2,2]}},{"kind":"upsample","config":{"name":"u","factor":2}},{"kind":"flatten","config":{"name":"f2"}}]}},` +
		`"likelihood":{"kind":"bernoulli"},"prior":{"kind":"standard_normal","dim":2}}`)
	f.Fuzz(func(t *testing.T, raw string) {
		var err error
		got := measure(func() { err = loadDescribed(raw) })
		if got > fuzzAllocBound(len(raw)) {
			t.Fatalf("loading description allocated %d bytes for %d bytes (%v)", got, len(raw), err)
		}
	})
}

// loadDescribed decodes raw, builds the tensors it implies (if they are
// few) and loads the resulting file.
func loadDescribed(raw string) error {
	spec, err := decodeSpec(raw)
	if err != nil {
		return err
	}
	ps, err := impliedParams(&spec, nil)
	if err != nil {
		return err
	}
	dtype := map[string]string{"float32": safetensors.F32, "float64": safetensors.F64}[spec.Dtype]
	size := map[string]int{safetensors.F32: 4, safetensors.F64: 8}[dtype]
	if size == 0 {
		return errors.New("dtype")
	}
	total := 0
	var ts []safetensors.Tensor
	for _, p := range ps {
		n, ok := product(p.Shape)
		if !ok && len(p.Shape) > 0 {
			return errors.New("shape")
		}
		if total += n; total > 1<<16 {
			return errors.New("too many values for the fuzzer")
		}
		ts = append(ts, safetensors.Tensor{Name: p.Name, Dtype: dtype, Shape: p.Shape, Data: make([]byte, n*size)})
	}
	meta := map[string]string{metaFormat: formatV2, metaModel: raw, metaSHA256: digests(ts)}
	file := &safetensors.File{Metadata: meta, Tensors: tensorMap(ts)}
	m, err := load("fuzz", file, loadConfig{maxBytes: DefaultMaxBytes, maxFeatures: fuzzMaxFeatures})
	if err != nil {
		return err
	}
	if m == nil {
		return errors.New("nil model without an error")
	}
	return nil
}

// The description decoder refuses what issue 8 lists, and the helper the
// fuzz target uses accepts a valid description (so the target reaches the
// builders).
func TestLoadDescribedSeeds(t *testing.T) {
	small, err := NewMLP(MLPConfig{Input: 4, Hidden: []int{3}, Latent: 2, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	spec, err := small.spec()
	if err != nil {
		t.Fatal(err)
	}
	b, _ := json.Marshal(spec)
	if err := loadDescribed(string(b)); err != nil {
		t.Fatalf("valid description: %v", err)
	}
	conv := `{"input_shape":[1,4,4],"dtype":"float32","latent":2,` +
		`"encoder":{"kind":"sequential","config":{"name":"enc","layers":[{"kind":"conv2d","config":{"name":"enc.c","in":1,"out":2,"kernel":[3,3],"stride":[1,1],"padding":[1,1],"activation":"elu"}},{"kind":"flatten","config":{"name":"f"}}]}},` +
		`"head":{"kind":"gaussian_head","config":{"name":"head","in":32,"latent":2}},` +
		`"decoder":{"kind":"sequential","config":{"name":"dec","layers":[{"kind":"dense","config":{"name":"dec.d","in":2,"out":4}},{"kind":"reshape","config":{"name":"r","shape":[1,2,2]}},{"kind":"upsample","config":{"name":"u","factor":2}},{"kind":"flatten","config":{"name":"f2"}}]}},` +
		`"likelihood":{"kind":"bernoulli"},"prior":{"kind":"standard_normal","dim":2},` +
		`"transforms":[{"target":"head.logvar","op":"soft_clamp","lo":-30,"hi":20,"result":"log-variance of q(z|x)"},{"target":"decoder","op":"sigmoid","result":"Bernoulli mean of p(x|z)"}]}`
	if err := loadDescribed(conv); err != nil {
		t.Fatalf("convolutional description: %v", err)
	}
	for name, raw := range map[string]string{
		"unknown key":   strings.Replace(string(b), `"latent":2`, `"latent":2,"width":9`, 1),
		"duplicate key": strings.Replace(string(b), `"latent":2`, `"latent":2,"latent":2`, 1),
		"latent":        strings.Replace(string(b), `"latent":2`, `"latent":3`, 1),
		"transforms":    strings.Replace(string(b), `"lo":-30`, `"lo":-20`, 1),
		"no transforms": strings.Replace(string(b), `"transforms":`, `"x":`, 1),
		"not an object": `[1,2]`,
		"trailing":      string(b) + `x`,
		"deep nesting":  strings.Repeat(`{"kind":"sequential","config":{"name":"s","layers":[`, 100),
	} {
		if err := loadDescribed(raw); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
	_ = layers.LogVarMin
}
