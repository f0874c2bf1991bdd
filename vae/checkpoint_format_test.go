package vae

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/layers"
	"lowerbound.dev/losses"
)

// fileTransforms reads the transforms of a checkpoint the way a program in
// another language would: safetensors header, then the JSON of the
// "lowerbound.model" metadata value, as checkpoint_format.md describes it.
func fileTransforms(t *testing.T, path string) (map[string]map[string]any, *safetensors.File) {
	t.Helper()
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if f.Metadata["lowerbound.format"] != "2" {
		t.Fatalf("format %q", f.Metadata["lowerbound.format"])
	}
	var desc struct {
		Transforms []map[string]any `json:"transforms"`
	}
	if err := json.Unmarshal([]byte(f.Metadata["lowerbound.model"]), &desc); err != nil {
		t.Fatal(err)
	}
	out := map[string]map[string]any{}
	for _, tr := range desc.Transforms {
		out[tr["target"].(string)] = tr
	}
	return out, f
}

func refSoftplus(x float64) float64 { return math.Max(x, 0) + math.Log1p(math.Exp(-math.Abs(x))) }

// The learned-sigma Gaussian: the file says how the stored parameter r maps
// to log sigma (issue 8: a reader that took r as log sigma was off by about
// 0.33 nats per record). Recomputing the log-likelihood from the file alone,
// with gonum's distuv.Normal as the density, matches the SDK's to 1e-12;
// taking r as log sigma does not.
func TestFormatRecordsLearnedSigmaTransform(t *testing.T) {
	lik, err := losses.NewLearnedGaussian("lik", 3, tensor.Float64)
	if err != nil {
		t.Fatal(err)
	}
	m, err := NewMLP(MLPConfig{Input: 3, Hidden: []int{4}, Latent: 2, Dtype: tensor.Float64, Seed: 3, Likelihood: lik})
	if err != nil {
		t.Fatal(err)
	}
	r := []float64{-8, -6.5, 0.25} // below, near and above the floor log(1e-3)
	copy(lik.Params()[0].Value.Data().([]float64), r)
	path := filepath.Join(t.TempDir(), "m.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	trs, f := fileTransforms(t, path)
	tr, ok := trs["lik.log_sigma"]
	if !ok || tr["op"] != "softplus_floor" {
		t.Fatalf("transform of lik.log_sigma: %v", trs)
	}
	lo := tr["lo"].(float64)
	if lo != math.Log(1e-3) {
		t.Errorf("recorded floor %v, want log(1e-3) = %v", lo, math.Log(1e-3))
	}
	stored, err := f.Tensors["lik.log_sigma"].Float64s()
	if err != nil {
		t.Fatal(err)
	}
	x := []float64{0.3, -1.2, 2.0}
	mean := []float64{0.31, -1.0, 1.5}
	var fromFile, naive float64
	for i := range x {
		sigma := math.Exp(lo + refSoftplus(stored[i]-lo)) // the recorded formula
		fromFile += distuv.Normal{Mu: mean[i], Sigma: sigma}.LogProb(x[i])
		naive += distuv.Normal{Mu: mean[i], Sigma: math.Exp(stored[i])}.LogProb(x[i])
	}
	sdk := likelihoodValue(t, m.Likelihood(), x, mean)
	if !relClose(sdk, fromFile, 1e-12) {
		t.Errorf("SDK log-likelihood %v, recomputed from the file %v", sdk, fromFile)
	}
	if math.Abs(sdk-naive) < 0.1 {
		t.Errorf("the fixture does not exercise the transform: naive %v vs %v", naive, sdk)
	}
}

// likelihoodValue runs lik.LogProb for one record in a small graph.
func likelihoodValue(t *testing.T, lik losses.Likelihood, x, out []float64) float64 {
	t.Helper()
	g := G.NewGraph()
	s := layers.NewScope(g)
	// Input nodes need names: gorgonia merges unnamed nodes of equal type.
	xn := G.NewMatrix(g, tensor.Float64, G.WithShape(1, len(x)), G.WithName("x"), G.WithValue(tensor.New(tensor.WithShape(1, len(x)), tensor.WithBacking(slices.Clone(x)))))
	on := G.NewMatrix(g, tensor.Float64, G.WithShape(1, len(out)), G.WithName("out"), G.WithValue(tensor.New(tensor.WithShape(1, len(out)), tensor.WithBacking(slices.Clone(out)))))
	lp, err := lik.LogProb(s, xn, on)
	if err != nil {
		t.Fatal(err)
	}
	var v G.Value
	G.Read(lp, &v)
	vm := G.NewTapeMachine(g)
	defer vm.Close()
	if err := vm.RunAll(); err != nil {
		t.Fatal(err)
	}
	return v.Data().([]float64)[0]
}

// The encoder's log-variance clamp: with the logvar weights at zero the raw
// output is the bias, set beyond both bounds; Encode's sigma equals
// exp(y/2) with y the recorded soft clamp of the stored bias, computed
// here from the formula in the file's transform (math.Log1p, math.Exp).
func TestFormatRecordsLogVarClamp(t *testing.T) {
	m, err := NewMLP(MLPConfig{Input: 3, Hidden: []int{4}, Latent: 3, Dtype: tensor.Float64, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range m.Params() {
		switch p.Name {
		case "head.logvar.weight":
			clear(p.Value.Data().([]float64))
		case "head.logvar.bias":
			copy(p.Value.Data().([]float64), []float64{25, -36, 1.5})
		}
	}
	path := filepath.Join(t.TempDir(), "m.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	trs, f := fileTransforms(t, path)
	tr, ok := trs["head.logvar"]
	if !ok || tr["op"] != "soft_clamp" {
		t.Fatalf("transform of head.logvar: %v", trs)
	}
	lo, hi := tr["lo"].(float64), tr["hi"].(float64)
	bias, _ := f.Tensors["head.logvar.bias"].Float64s()
	_, sigma, err := m.Encode(context.Background(), binarySet(t, 2, 3, 1))
	if err != nil {
		t.Fatal(err)
	}
	for j, b := range bias {
		y := b + refSoftplus(lo-b) - refSoftplus(b-hi)
		if want := math.Exp(y / 2); !relClose(sigma.At(0, j), want, 1e-12) {
			t.Errorf("latent %d: Encode sigma %v, recomputed from the file %v (raw %v)", j, sigma.At(0, j), want, b)
		}
	}
	if math.Abs(sigma.At(0, 0)-math.Exp(25.0/2)) < 1 {
		t.Error("the fixture does not exercise the clamp")
	}
}

// Format 1 files (no digests, no transforms) still load, to the same model.
func TestLoadFormat1(t *testing.T) {
	dir := t.TempDir()
	m := smallMLP(t, 4)
	path := filepath.Join(dir, "v2.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	meta := maps2(f.Metadata)
	meta["lowerbound.format"] = "1"
	delete(meta, "lowerbound.sha256")
	meta = editDescription(t, meta, func(d map[string]any) { delete(d, "transforms") })
	v1 := filepath.Join(dir, "v1.safetensors")
	rewrite(t, v1, f, meta, nil)
	back, err := Load(v1)
	if err != nil {
		t.Fatalf("Load of a format 1 file: %v", err)
	}
	checkSameModel(t, m, back, binarySet(t, 5, 12, 1))
	// A format 1 file with transforms, or a format 2 file without digests,
	// is not what either version writes.
	meta2 := maps2(meta)
	meta2["lowerbound.model"] = f.Metadata["lowerbound.model"]
	rewrite(t, v1, f, meta2, nil)
	_, err = Load(v1)
	wantErr(t, "format 1 with transforms", err, ErrCheckpoint, "transforms")
	meta3 := maps2(f.Metadata)
	delete(meta3, "lowerbound.sha256")
	rewrite(t, v1, f, meta3, nil)
	_, err = Load(v1)
	wantErr(t, "format 2 without digests", err, ErrCheckpoint, "lowerbound.sha256")
}

// SaveTo and LoadFrom round-trip; SaveTo writes the bytes Save writes;
// LoadWeightsFrom reads them into a model built in code.
func TestSaveToLoadFrom(t *testing.T) {
	m := smallMLP(t, 6)
	if err := m.SetExtra("k", "v"); err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	if err := m.SaveTo(&buf); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "m.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	if b, _ := os.ReadFile(path); !bytes.Equal(b, buf.Bytes()) {
		t.Error("SaveTo and Save wrote different bytes")
	}
	back, err := LoadFrom(bytes.NewReader(buf.Bytes()))
	if err != nil {
		t.Fatal(err)
	}
	checkSameModel(t, m, back, binarySet(t, 5, 12, 2))
	if back.Extra()["k"] != "v" {
		t.Errorf("extra after LoadFrom: %v", back.Extra())
	}
	fresh := smallMLP(t, 99)
	if err := fresh.LoadWeightsFrom(bytes.NewReader(buf.Bytes())); err != nil {
		t.Fatal(err)
	}
	checkSameModel(t, m, fresh, binarySet(t, 5, 12, 2))
	// Limits: one byte under the size refuses it, from the header alone.
	_, err = LoadFrom(bytes.NewReader(buf.Bytes()), MaxBytes(int64(buf.Len()-1)))
	wantErr(t, "LoadFrom over MaxBytes", err, ErrCheckpoint, "limit")
	_, err = Load(path, MaxBytes(int64(buf.Len()-1)))
	wantErr(t, "Load over MaxBytes", err, ErrCheckpoint, "limit")
	wantErr(t, "LoadWeightsFrom over MaxBytes", fresh.LoadWeightsFrom(bytes.NewReader(buf.Bytes()), MaxBytes(100)), ErrCheckpoint)
	_, err = LoadFrom(bytes.NewReader(buf.Bytes()), MaxFeatures(11))
	wantErr(t, "LoadFrom over MaxFeatures", err, ErrCheckpoint, "input_shape")
	_, err = LoadFrom(nil)
	wantErr(t, "LoadFrom(nil)", err, layers.ErrInvalidArgument)
}

// A stream whose header promises gigabytes of tensors but ends early costs
// LoadFrom about its own size: under 1 MiB here, not the 4 GB claimed.
func TestLoadFromShortStreamAllocatesLittle(t *testing.T) {
	hdr := `{"a":{"dtype":"F32","shape":[1000000000],"data_offsets":[0,4000000000]},"__metadata__":{"lowerbound.format":"2"}}`
	in := make([]byte, 8, 8+len(hdr)+16)
	in[0], in[1] = byte(len(hdr)), byte(len(hdr)>>8)
	in = append(append(in, hdr...), make([]byte, 16)...)
	var err error
	got := allocated(func() { _, err = LoadFrom(bytes.NewReader(in)) })
	wantErr(t, "short stream", err, ErrCheckpoint)
	if !errors.Is(err, safetensors.ErrTruncated) {
		t.Errorf("error %v, want safetensors.ErrTruncated", err)
	}
	if got > 1<<20 {
		t.Errorf("LoadFrom allocated %d bytes for a %d-byte stream", got, len(in))
	}
}

// Issue 8, item 10 through the model: Save removes the temporaries that
// killed saves of the same file left, and nothing else.
func TestSaveRemovesStaleTemporaries(t *testing.T) {
	dir := t.TempDir()
	names := []string{".m.safetensors.tmp-1234", ".m.safetensors.tmp-99", ".n.safetensors.tmp-1", "keep.txt"}
	for _, n := range names {
		if err := os.WriteFile(filepath.Join(dir, n), []byte("x"), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	if err := smallMLP(t, 1).Save(filepath.Join(dir, "m.safetensors")); err != nil {
		t.Fatal(err)
	}
	ents, _ := os.ReadDir(dir)
	var got []string
	for _, e := range ents {
		got = append(got, e.Name())
	}
	if want := []string{".n.safetensors.tmp-1", "keep.txt", "m.safetensors"}; !slices.Equal(got, want) {
		t.Errorf("after Save the folder holds %v, want %v", got, want)
	}
}

// Save refuses a model with a non-finite parameter, naming it, and writes
// nothing.
func TestSaveRefusesNonFinite(t *testing.T) {
	m := smallMLP(t, 1)
	p := m.Params()[2]
	p.Value.Data().([]float64)[1] = math.Inf(-1)
	path := filepath.Join(t.TempDir(), "m.safetensors")
	wantErr(t, "Save with -Inf", m.Save(path), ErrNonFinite, p.Name, "element 1")
	if _, err := os.Stat(path); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("Save wrote %s: %v", path, err)
	}
	if !strings.Contains(p.Name, ".") {
		t.Fatalf("fixture: %s", p.Name)
	}
}
