package vae

import (
	"path/filepath"
	"strings"
	"testing"

	"gorgonia.org/tensor"

	"lowerbound.dev/internal/safetensors"
	"lowerbound.dev/losses"
)

// A columns likelihood is described strictly: Load rebuilds it (with its
// log sigma transform) and refuses a description whose columns differ from
// the tensors or from the SDK's rules.
func TestCheckpointColumnsStrict(t *testing.T) {
	dir := t.TempDir()
	cols := []losses.Column{
		{Name: "a", Kind: losses.ColumnReal, LearnSigma: true},
		{Name: "b", Kind: losses.ColumnPositive, Sigma: 0.5},
		{Name: "c", Kind: losses.ColumnCount},
		{Name: "d", Kind: losses.ColumnBinary},
		{Name: "e", Kind: losses.ColumnCategorical, Categories: 3},
	}
	lik, err := losses.NewColumns("lik", cols, tensor.Float32)
	if err != nil {
		t.Fatal(err)
	}
	m, err := NewMLP(MLPConfig{Input: 5, Hidden: []int{3}, Latent: 2, Likelihood: lik, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, "cols.safetensors")
	if err := m.Save(path); err != nil {
		t.Fatal(err)
	}
	back, err := Load(path)
	if err != nil {
		t.Fatal(err)
	}
	spec, ok := losses.DescribeLikelihood(back.Likelihood())
	if !ok || spec.Kind != losses.KindColumns || len(spec.Columns) != 5 || spec.Columns[4].Categories != 3 || !spec.Columns[0].LearnSigma {
		t.Fatalf("rebuilt likelihood %+v", spec)
	}
	f, err := safetensors.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if raw := f.Metadata["lowerbound.model"]; !strings.Contains(raw, `"target":"lik.log_sigma","op":"softplus_floor"`) {
		t.Errorf("no log sigma transform in %s", raw)
	}
	col := func(d map[string]any, j int) map[string]any {
		return d["likelihood"].(map[string]any)["columns"].([]any)[j].(map[string]any)
	}
	cases := map[string]map[string]string{
		"unknown column key": editDescription(t, f.Metadata, func(d map[string]any) { col(d, 0)["unit"] = "K" }),
		"features differ":    editDescription(t, f.Metadata, func(d map[string]any) { d["likelihood"].(map[string]any)["features"] = 4 }),
		"column dropped": editDescription(t, f.Metadata, func(d map[string]any) {
			l := d["likelihood"].(map[string]any)
			l["columns"] = l["columns"].([]any)[:4]
		}),
		"unknown kind":          editDescription(t, f.Metadata, func(d map[string]any) { col(d, 2)["kind"] = "angle" }),
		"one category":          editDescription(t, f.Metadata, func(d map[string]any) { col(d, 4)["categories"] = 1 }),
		"categories differ":     editDescription(t, f.Metadata, func(d map[string]any) { col(d, 4)["categories"] = 4 }),
		"huge categories":       editDescription(t, f.Metadata, func(d map[string]any) { col(d, 4)["categories"] = 1 << 40 }),
		"sigma on a count":      editDescription(t, f.Metadata, func(d map[string]any) { col(d, 2)["sigma"] = 2 }),
		"learned sigma dropped": editDescription(t, f.Metadata, func(d map[string]any) { delete(col(d, 0), "learn_sigma") }),
		"columns on a gaussian": editDescription(t, f.Metadata, func(d map[string]any) {
			d["likelihood"].(map[string]any)["kind"] = "gaussian"
			d["likelihood"].(map[string]any)["sigma"] = 1
		}),
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
