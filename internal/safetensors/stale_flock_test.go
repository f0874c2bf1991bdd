//go:build linux || darwin || freebsd || netbsd || openbsd || dragonfly

package safetensors

import (
	"os"
	"path/filepath"
	"syscall"
	"testing"
)

// A temporary file that a live save holds locked is not removed, even when
// it looks old; the next save after the lock is gone removes it.
func TestWriteFileKeepsLockedTemporary(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "m.safetensors")
	live := filepath.Join(dir, ".m.safetensors.tmp-42")
	f, err := os.Create(live)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		t.Skipf("flock not available here: %v", err)
	}
	markOld(t, dir, []string{".m.safetensors.tmp-42"})
	a, _ := FromFloat32("a", []int{1}, []float32{1})
	if err := WriteFile(path, []Tensor{a}, nil); err != nil {
		t.Fatal(err)
	}
	assertOnlySet(t, dir, ".m.safetensors.tmp-42", "m.safetensors")
	f.Close() // the "save" dies
	if err := WriteFile(path, []Tensor{a}, nil); err != nil {
		t.Fatal(err)
	}
	assertOnlySet(t, dir, "m.safetensors")
}
