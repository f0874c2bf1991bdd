package safetensors

import (
	"os"
	"path/filepath"
	"slices"
	"testing"
	"time"
)

// Temporary files left by killed saves of the same target are removed by
// the next save; other files, and temporaries of other targets, stay.
func TestWriteFileRemovesStaleTemporaries(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "m.safetensors")
	stale := []string{".m.safetensors.tmp-123456", ".m.safetensors.tmp-4294967295", ".m.safetensors.tmp-7"}
	keep := []string{".other.safetensors.tmp-123", ".m.safetensors.tmp-12x", ".m.safetensors.tmp-", "m.safetensors.tmp-1", "notes.txt"}
	for _, n := range append(append([]string{}, stale...), keep...) {
		if err := os.WriteFile(filepath.Join(dir, n), []byte("partial"), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	// Where flock is not available, only old files count as stale.
	markOld(t, dir, stale)
	a, _ := FromFloat32("a", []int{1}, []float32{1})
	if err := WriteFile(path, []Tensor{a}, nil); err != nil {
		t.Fatal(err)
	}
	want := append([]string{}, keep...)
	want = append(want, "m.safetensors")
	assertOnlySet(t, dir, want...)
}

func markOld(t *testing.T, dir string, names []string) {
	t.Helper()
	old := time.Date(2000, 1, 1, 0, 0, 0, 0, time.UTC)
	for _, n := range names {
		if err := os.Chtimes(filepath.Join(dir, n), old, old); err != nil {
			t.Fatal(err)
		}
	}
}

func assertOnlySet(t *testing.T, dir string, names ...string) {
	t.Helper()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for _, e := range ents {
		got = append(got, e.Name())
	}
	slices.Sort(got)
	names = slices.Clone(names)
	slices.Sort(names)
	if !slices.Equal(got, names) {
		t.Errorf("directory holds %v, want %v", got, names)
	}
}
