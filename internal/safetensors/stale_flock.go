//go:build linux || darwin || freebsd || netbsd || openbsd || dragonfly

package safetensors

import (
	"errors"
	"os"
	"syscall"
)

// lockTemp takes an exclusive advisory lock (flock) on a temporary file
// being written. The lock goes with the open file: the kernel drops it when
// the file is closed or the process dies, however it dies, so a temporary
// file that nobody holds locked was left by a save that can no longer
// finish.
func lockTemp(f *os.File) error {
	err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB)
	if errors.Is(err, syscall.ENOTSUP) || errors.Is(err, syscall.EOPNOTSUPP) {
		return nil // a file system without flock: no lock, no cleanup of it by others
	}
	return err
}

// removeIfStale removes the temporary file at path if no live save holds
// it: it takes the file's lock without waiting, removes the file and
// releases the lock. A file it cannot open or lock is left alone.
func removeIfStale(path string) {
	f, err := os.OpenFile(path, os.O_RDWR, 0)
	if err != nil {
		return
	}
	defer f.Close()
	if syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB) != nil {
		return
	}
	os.Remove(path)
}
