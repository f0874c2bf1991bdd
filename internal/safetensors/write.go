package safetensors

import (
	"bufio"
	"bytes"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"strings"
	"unicode/utf8"
)

// headerEntry is one tensor's header record. The fields are declared in
// sorted key order so the JSON is fully key-sorted.
type headerEntry struct {
	DataOffsets [2]int `json:"data_offsets"`
	Dtype       string `json:"dtype"`
	Shape       []int  `json:"shape"`
}

// encodeHeader validates the tensors and returns them sorted by name with the
// padded header JSON.
func encodeHeader(where string, tensors []Tensor, metadata map[string]string) ([]Tensor, []byte, error) {
	sorted := slices.Clone(tensors)
	slices.SortFunc(sorted, func(a, b Tensor) int { return strings.Compare(a.Name, b.Name) })
	header := make(map[string]any, len(sorted)+1)
	offset := 0
	for i, t := range sorted {
		switch {
		case t.Name == "":
			return nil, nil, argError(where, "tensors", "empty tensor name")
		case t.Name == metaKey:
			return nil, nil, argError(where, "tensors", "tensor name %q is reserved", metaKey)
		case !utf8.ValidString(t.Name):
			return nil, nil, argError(where, "tensors", "tensor name %q is not valid UTF-8", t.Name)
		case i > 0 && sorted[i-1].Name == t.Name:
			return nil, nil, argError(where, "tensors", "duplicate tensor name %q", t.Name)
		}
		if err := t.Validate(); err != nil {
			return nil, nil, fmt.Errorf("%s: %w", where, err)
		}
		shape := t.Shape
		if shape == nil {
			shape = []int{} // a scalar is [], never null
		}
		header[t.Name] = headerEntry{DataOffsets: [2]int{offset, offset + len(t.Data)}, Dtype: t.Dtype, Shape: shape}
		offset += len(t.Data)
	}
	if len(metadata) > 0 {
		for k, v := range metadata {
			if !utf8.ValidString(k) || !utf8.ValidString(v) {
				return nil, nil, argError(where, "metadata", "key %q or its value is not valid UTF-8", k)
			}
		}
		header[metaKey] = metadata
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(header); err != nil { // maps encode with sorted keys
		return nil, nil, fmt.Errorf("%s: header: %w", where, err)
	}
	hdr := bytes.TrimSuffix(buf.Bytes(), []byte("\n"))
	// Pad with spaces so the byte buffer starts at a multiple of 8; the
	// format allows trailing spaces in the header.
	for len(hdr)%8 != 0 {
		hdr = append(hdr, ' ')
	}
	if len(hdr) > MaxHeaderSize {
		return nil, nil, argError(where, "tensors", "header of %d bytes exceeds %d", len(hdr), MaxHeaderSize)
	}
	return sorted, hdr, nil
}

// Write writes the tensors and metadata (which may be nil) to w in the
// safetensors format. The output is deterministic: tensors are laid out in
// the byte buffer in name order, the header JSON has sorted keys and no
// insignificant whitespace, and is padded with spaces to a multiple of 8
// bytes. Names must be non-empty, unique, valid UTF-8 and not
// "__metadata__"; every tensor must pass Tensor.Validate. Nothing is written
// if an argument is invalid.
func Write(w io.Writer, tensors []Tensor, metadata map[string]string) error {
	return write("safetensors.Write", w, tensors, metadata)
}

func write(where string, w io.Writer, tensors []Tensor, metadata map[string]string) error {
	sorted, hdr, err := encodeHeader(where, tensors, metadata)
	if err != nil {
		return err
	}
	bw := bufio.NewWriterSize(w, 1<<16)
	var n [8]byte
	binary.LittleEndian.PutUint64(n[:], uint64(len(hdr)))
	bw.Write(n[:])
	bw.Write(hdr)
	for _, t := range sorted {
		bw.Write(t.Data) // bufio keeps the first error; Flush reports it
	}
	if err := bw.Flush(); err != nil {
		return fmt.Errorf("%s: %w", where, err)
	}
	return nil
}

// WriteFile writes the tensors and metadata to path atomically: the file is
// written to a temporary file in the same directory, synced, closed and
// renamed over path, and then the directory is synced. On any error before
// the rename the old file at path is untouched and the temporary file is
// removed. A new file gets permissions 0644; a replaced file keeps its
// permission bits. A symlink at path is replaced, not followed.
//
// The temporary file is named "." + base + ".tmp-" + digits, where base is
// the last element of path. A process killed during a save cannot remove
// it, so every WriteFile first removes the temporary files of the same
// target that no live save is writing: on Linux, macOS and the BSDs a save
// holds an advisory lock (flock) on its temporary file, which the kernel
// releases when the process ends, and WriteFile removes each such file it
// can lock; elsewhere it removes those unmodified for an hour. Temporary
// files of other targets and every other file are never touched. So at
// most one stale temporary file per target outlives a crash, until the
// next save of that target.
func WriteFile(path string, tensors []Tensor, metadata map[string]string) error {
	return writeFile(path, tensors, metadata, nil)
}

// writeFile is WriteFile with a hook for tests: wrap, if not nil, wraps the
// temporary file's writer (to inject write errors).
func writeFile(path string, tensors []Tensor, metadata map[string]string, wrap func(io.Writer) io.Writer) (err error) {
	const where = "safetensors.WriteFile"
	// Validate before touching the file system.
	if _, _, err := encodeHeader(where, tensors, metadata); err != nil {
		return err
	}
	dir, base := filepath.Split(path)
	if dir == "" {
		dir = "."
	}
	if base == "" {
		return argError(where, "path", "%q names a directory", path)
	}
	perm := fs.FileMode(0o644)
	if fi, err := os.Lstat(path); err == nil && fi.Mode().IsRegular() {
		perm = fi.Mode().Perm()
	}
	removeStaleTemps(dir, base)
	f, err := os.CreateTemp(dir, tempPrefix(base)+"*")
	if err != nil {
		return fmt.Errorf("%s: %s: %w", where, path, err)
	}
	tmp := f.Name()
	closed, renamed := false, false
	defer func() {
		if err != nil && !closed {
			f.Close()
		}
		if err != nil && !renamed {
			os.Remove(tmp)
		}
	}()
	if err := lockTemp(f); err != nil {
		return fmt.Errorf("%s: %s: lock the temporary file: %w", where, path, err)
	}
	var w io.Writer = f
	if wrap != nil {
		w = wrap(f)
	}
	if err := write(where+": "+path, w, tensors, metadata); err != nil {
		return err
	}
	if err := f.Chmod(perm); err != nil {
		return fmt.Errorf("%s: %s: %w", where, path, err)
	}
	if err := f.Sync(); err != nil {
		return fmt.Errorf("%s: %s: sync: %w", where, path, err)
	}
	closed = true
	if err := f.Close(); err != nil {
		return fmt.Errorf("%s: %s: close: %w", where, path, err)
	}
	if err := os.Rename(tmp, path); err != nil {
		return fmt.Errorf("%s: %w", where, err)
	}
	renamed = true
	// The new file is in place; make the rename durable. An error here means
	// the new contents may not survive a crash.
	if err := syncDir(dir); err != nil {
		return fmt.Errorf("%s: %s: sync directory: %w", where, path, err)
	}
	return nil
}

func syncDir(dir string) error {
	if runtime.GOOS == "windows" {
		return nil // directories cannot be opened for syncing there
	}
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	err = d.Sync()
	if cerr := d.Close(); err == nil {
		err = cerr
	}
	if errors.Is(err, errors.ErrUnsupported) {
		return nil
	}
	return err
}

// tempPrefix is the name prefix of base's temporary files.
func tempPrefix(base string) string { return "." + base + ".tmp-" }

// removeStaleTemps removes the temporary files of the target base in dir
// that no live save holds (see WriteFile). Errors are ignored: cleaning up
// is a courtesy and must not fail the save.
func removeStaleTemps(dir, base string) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		return
	}
	prefix := tempPrefix(base)
	for _, e := range ents {
		name := e.Name()
		rest, ok := strings.CutPrefix(name, prefix)
		if !ok || rest == "" || strings.Trim(rest, "0123456789") != "" || !e.Type().IsRegular() {
			continue
		}
		removeIfStale(filepath.Join(dir, name))
	}
}
