//go:build !(linux || darwin || freebsd || netbsd || openbsd || dragonfly)

package safetensors

import (
	"os"
	"time"
)

// staleAfter is how long a temporary file must have gone unmodified before
// a save removes it, where file locks are not available.
const staleAfter = time.Hour

func lockTemp(*os.File) error { return nil }

// removeIfStale removes the temporary file at path if it was last modified
// more than staleAfter ago (a save in progress writes to it continuously).
func removeIfStale(path string) {
	fi, err := os.Lstat(path)
	if err != nil || !fi.Mode().IsRegular() || time.Since(fi.ModTime()) < staleAfter {
		return
	}
	os.Remove(path)
}
