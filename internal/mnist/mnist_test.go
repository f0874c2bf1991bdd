package mnist

import (
	"context"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"gonum.org/v1/gonum/floats/scalar"
)

func TestDirFindsFiles(t *testing.T) {
	if testing.Short() {
		t.Skip("runs go mod download (may use the network); skipped with -short")
	}
	if _, err := exec.LookPath("go"); err != nil {
		t.Skip("go command not available")
	}
	t.Setenv(EnvDir, "") // make sure the go command path is the one tested
	dir, err := Dir(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	if filepath.Base(dir) != "data" {
		t.Errorf("dir %s does not end in data", dir)
	}
	for _, f := range Files() {
		b, err := os.ReadFile(filepath.Join(dir, f))
		if err != nil {
			t.Fatal(err)
		}
		// Each file is gzipped (magic 1f 8b, RFC 1952) ...
		if len(b) < 2 || b[0] != 0x1f || b[1] != 0x8b {
			t.Fatalf("%s is not gzip", f)
		}
	}
}

func TestDirEnvOverride(t *testing.T) {
	dir := t.TempDir()
	t.Setenv(EnvDir, dir)
	_, err := Dir(context.Background())
	if !errors.Is(err, ErrNotFound) {
		t.Fatalf("empty dir: err %v, want ErrNotFound", err)
	}
	for _, f := range Files() {
		if err := os.WriteFile(filepath.Join(dir, f), nil, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	got, err := Dir(context.Background())
	if err != nil || got != dir {
		t.Fatalf("Dir = %q, %v; want %q", got, err, dir)
	}
}

func TestDirCancelled(t *testing.T) {
	if _, err := exec.LookPath("go"); err != nil {
		t.Skip("go command not available")
	}
	t.Setenv(EnvDir, "")
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := Dir(ctx); !errors.Is(err, context.Canceled) {
		t.Fatalf("cancelled context: err %v, want context.Canceled", err)
	}
}

func TestLoad(t *testing.T) {
	if testing.Short() {
		t.Skip("reads MNIST; skipped with -short")
	}
	if _, err := exec.LookPath("go"); err != nil && os.Getenv(EnvDir) == "" {
		t.Skip("go command not available")
	}
	ctx := context.Background()
	const limit = 200
	raw, rawTest, err := Load(ctx, Options{Raw: true, Limit: limit})
	if err != nil {
		t.Fatal(err)
	}
	scaled, _, err := Load(ctx, Options{Limit: limit})
	if err != nil {
		t.Fatal(err)
	}
	bin, _, err := Load(ctx, Options{Binarize: true, Limit: limit})
	if err != nil {
		t.Fatal(err)
	}
	if raw.Len() != limit || rawTest.Len() != limit || raw.Features() != 28*28 || raw.Classes() != 10 {
		t.Fatalf("len %d/%d features %d classes %d", raw.Len(), rawTest.Len(), raw.Features(), raw.Classes())
	}
	// First labels of the training and test files: 5 and 7 (widely cited,
	// from memory).
	if raw.Label(0) != 5 || rawTest.Label(0) != 7 {
		t.Fatalf("first labels %d, %d; want 5, 7", raw.Label(0), rawTest.Label(0))
	}
	ones := 0
	for i := range limit {
		r, s, b := raw.Row(i), scaled.Row(i), bin.Row(i)
		for j := range r {
			// Scaling multiplies by 1/255, which can differ from r/255 in
			// the last bit; reference: gonum floats/scalar.EqualWithinULP.
			if !scalar.EqualWithinULP(s[j], r[j]/255, 1) || s[j] < 0 || s[j] > 1 {
				t.Fatalf("record %d pixel %d: scaled %v, raw %v / 255 = %v", i, j, s[j], r[j], r[j]/255)
			}
			want := 0.0
			if r[j] >= 128 {
				want = 1
			}
			if b[j] != want {
				t.Fatalf("record %d pixel %d: binarized %v, raw %v", i, j, b[j], r[j])
			}
			ones += int(b[j])
		}
	}
	// Digits cover a minority of each 28x28 image: a sanity bound on the
	// binarized ink (common knowledge about MNIST, roughly 10-20%).
	frac := float64(ones) / float64(limit*784)
	if frac < 0.05 || frac > 0.3 {
		t.Fatalf("fraction of ink pixels %.3f outside [0.05, 0.3]", frac)
	}
	if _, _, err := Load(ctx, Options{Limit: -1}); err == nil {
		t.Fatal("negative limit accepted")
	}
}
