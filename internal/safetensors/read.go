package safetensors

import (
	"bytes"
	"cmp"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"slices"
	"unicode/utf8"
)

// MaxHeaderSize is the largest header length accepted, in bytes (100 MB).
// A larger length is taken as corruption rather than allocated.
const MaxHeaderSize = 100_000_000

// ErrCorrupt is wrapped by every error that reports a malformed file.
var ErrCorrupt = errors.New("corrupt safetensors file")

// ErrTruncated is wrapped by errors that report a file that ends too early.
// It wraps ErrCorrupt, so errors.Is(err, ErrCorrupt) holds for it too.
var ErrTruncated = fmt.Errorf("truncated: %w", ErrCorrupt)

// ErrNotFound is wrapped by File.Tensor when no tensor has the name.
var ErrNotFound = errors.New("tensor not found")

// File is the content of one safetensors file.
type File struct {
	// Metadata is the "__metadata__" map; empty (not nil) when absent.
	Metadata map[string]string
	// Tensors maps each tensor's name to the tensor.
	Tensors map[string]Tensor
}

// Tensor returns the tensor called name, or an error wrapping ErrNotFound.
func (f *File) Tensor(name string) (Tensor, error) {
	t, ok := f.Tensors[name]
	if !ok {
		return Tensor{}, fmt.Errorf("safetensors: tensor %q: %w", name, ErrNotFound)
	}
	return t, nil
}

// Names returns the tensor names in sorted order.
func (f *File) Names() []string {
	names := make([]string, 0, len(f.Tensors))
	for n := range f.Tensors {
		names = append(names, n)
	}
	slices.Sort(names)
	return names
}

// List returns the tensors sorted by name, ready for Write.
func (f *File) List() []Tensor {
	out := make([]Tensor, 0, len(f.Tensors))
	for _, n := range f.Names() {
		out = append(out, f.Tensors[n])
	}
	return out
}

// Read reads a safetensors file of size bytes from r and validates it
// completely (see the package documentation for the checks). Errors name
// the byte offset or tensor and wrap ErrCorrupt or ErrTruncated; I/O errors
// are returned wrapped as they are.
func Read(r io.ReaderAt, size int64) (*File, error) {
	return read("input", r, size)
}

// ReadBytes reads a safetensors file held in memory; see Read. The tensors'
// data are copies, not views of b.
func ReadBytes(b []byte) (*File, error) {
	return read("input", bytes.NewReader(b), int64(len(b)))
}

// ReadFile reads and validates the safetensors file at path; errors name
// the path.
func ReadFile(path string) (*File, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("safetensors: %w", err)
	}
	defer f.Close()
	fi, err := f.Stat()
	if err != nil {
		return nil, fmt.Errorf("safetensors: %w", err)
	}
	if !fi.Mode().IsRegular() {
		return nil, fmt.Errorf("safetensors: %s: not a regular file: %w", path, ErrCorrupt)
	}
	return read(path, f, fi.Size())
}

type entry struct {
	name       string
	dtype      string
	shape      []int
	begin, end int64
}

type reader struct {
	name string
}

func (r reader) at(off int64, sentinel error, format string, a ...any) error {
	return fmt.Errorf("safetensors: %s: byte offset %d: %s: %w", r.name, off, fmt.Sprintf(format, a...), sentinel)
}

func (r reader) tensor(name string, off int64, sentinel error, format string, a ...any) error {
	return fmt.Errorf("safetensors: %s: tensor %q (header byte offset %d): %s: %w", r.name, name, off, fmt.Sprintf(format, a...), sentinel)
}

func read(name string, ra io.ReaderAt, size int64) (*File, error) {
	r := reader{name: name}
	if size < 8 {
		return nil, r.at(0, ErrTruncated, "file of %d bytes is shorter than the 8-byte header length", size)
	}
	var lenBuf [8]byte
	if err := readFull(ra, lenBuf[:], 0); err != nil {
		return nil, r.io(0, err)
	}
	n := binary.LittleEndian.Uint64(lenBuf[:])
	if n > MaxHeaderSize {
		return nil, r.at(0, ErrCorrupt, "header length %d exceeds the limit of %d", n, MaxHeaderSize)
	}
	if n > uint64(size-8) {
		return nil, r.at(0, ErrTruncated, "header length %d runs past the end of the %d-byte file", n, size)
	}
	hdr := make([]byte, n)
	if err := readFull(ra, hdr, 8); err != nil {
		return nil, r.io(8, err)
	}
	bufStart := 8 + int64(n)
	bufLen := size - bufStart
	meta, entries, err := r.parseHeader(hdr)
	if err != nil {
		return nil, err
	}
	if err := r.checkLayout(entries, bufStart, bufLen); err != nil {
		return nil, err
	}
	// checkLayout proved the tensors cover [0, bufLen) exactly, so bufLen
	// is bounded by the (already read) header's claims and the file size.
	data := make([]byte, bufLen)
	if err := readFull(ra, data, bufStart); err != nil {
		return nil, r.io(bufStart, err)
	}
	f := &File{Metadata: meta, Tensors: make(map[string]Tensor, len(entries))}
	for _, e := range entries {
		f.Tensors[e.name] = Tensor{Name: e.name, Dtype: e.dtype, Shape: e.shape, Data: data[e.begin:e.end:e.end]}
	}
	return f, nil
}

func readFull(ra io.ReaderAt, p []byte, off int64) error {
	n, err := ra.ReadAt(p, off)
	if n == len(p) {
		return nil
	}
	if err == nil || err == io.EOF {
		err = io.ErrUnexpectedEOF
	}
	return err
}

func (r reader) io(off int64, err error) error {
	if errors.Is(err, io.ErrUnexpectedEOF) {
		return r.at(off, ErrTruncated, "file ends early")
	}
	return fmt.Errorf("safetensors: %s: byte offset %d: %w", r.name, off, err)
}

// parseHeader decodes the header JSON. Offsets in errors are file offsets
// (the header starts at byte 8).
func (r reader) parseHeader(hdr []byte) (map[string]string, []entry, error) {
	const base = 8
	if !utf8.Valid(hdr) {
		return nil, nil, r.at(base, ErrCorrupt, "header is not valid UTF-8")
	}
	if len(hdr) == 0 || hdr[0] != '{' {
		return nil, nil, r.at(base, ErrCorrupt, "header does not start with '{'")
	}
	dec := json.NewDecoder(bytes.NewReader(hdr))
	dec.DisallowUnknownFields()
	jsonErr := func(err error) error {
		off := dec.InputOffset()
		var se *json.SyntaxError
		if errors.As(err, &se) {
			off = se.Offset
		}
		return r.at(base+off, ErrCorrupt, "invalid header JSON: %v", err)
	}
	if _, err := dec.Token(); err != nil { // the '{' checked above
		return nil, nil, jsonErr(err)
	}
	meta := map[string]string{}
	var entries []entry
	seen := map[string]bool{}
	for dec.More() {
		keyOff := base + dec.InputOffset()
		tok, err := dec.Token()
		if err != nil {
			return nil, nil, jsonErr(err)
		}
		key, ok := tok.(string)
		if !ok {
			return nil, nil, r.at(keyOff, ErrCorrupt, "invalid header JSON: key is %v", tok)
		}
		if seen[key] {
			return nil, nil, r.at(keyOff, ErrCorrupt, "duplicate header key %q", key)
		}
		seen[key] = true
		if key == metaKey {
			if err := r.parseMetadata(dec, meta, jsonErr); err != nil {
				return nil, nil, err
			}
			continue
		}
		e, err := r.parseEntry(dec, key, keyOff, jsonErr)
		if err != nil {
			return nil, nil, err
		}
		entries = append(entries, e)
	}
	if _, err := dec.Token(); err != nil { // '}'
		return nil, nil, jsonErr(err)
	}
	end := dec.InputOffset()
	for i := end; i < int64(len(hdr)); i++ {
		if hdr[i] != ' ' {
			return nil, nil, r.at(base+i, ErrCorrupt, "header has byte %q after the JSON object (only space padding is allowed)", hdr[i])
		}
	}
	return meta, entries, nil
}

func (r reader) parseMetadata(dec *json.Decoder, meta map[string]string, jsonErr func(error) error) error {
	off := 8 + dec.InputOffset()
	tok, err := dec.Token()
	if err != nil {
		return jsonErr(err)
	}
	if tok != json.Delim('{') {
		return r.at(off, ErrCorrupt, "%s is not an object", metaKey)
	}
	for dec.More() {
		off := 8 + dec.InputOffset()
		tok, err := dec.Token()
		if err != nil {
			return jsonErr(err)
		}
		k, ok := tok.(string)
		if !ok {
			return r.at(off, ErrCorrupt, "invalid %s key %v", metaKey, tok)
		}
		if _, dup := meta[k]; dup {
			return r.at(off, ErrCorrupt, "duplicate %s key %q", metaKey, k)
		}
		tok, err = dec.Token()
		if err != nil {
			return jsonErr(err)
		}
		v, ok := tok.(string)
		if !ok {
			return r.at(off, ErrCorrupt, "%s value of %q is not a string", metaKey, k)
		}
		meta[k] = v
	}
	if _, err := dec.Token(); err != nil {
		return jsonErr(err)
	}
	return nil
}

func (r reader) parseEntry(dec *json.Decoder, name string, off int64, jsonErr func(error) error) (entry, error) {
	bad := func(format string, a ...any) (entry, error) {
		return entry{}, r.tensor(name, off, ErrCorrupt, format, a...)
	}
	tok, err := dec.Token()
	if err != nil {
		return entry{}, jsonErr(err)
	}
	if tok != json.Delim('{') {
		return bad("entry is not an object")
	}
	var (
		dtype   *string
		shape   []int64
		offsets []int64
		seen    = map[string]bool{}
	)
	for dec.More() {
		tok, err := dec.Token()
		if err != nil {
			return entry{}, jsonErr(err)
		}
		k, _ := tok.(string)
		if seen[k] {
			return bad("duplicate field %q", k)
		}
		seen[k] = true
		switch k {
		case "dtype":
			err = dec.Decode(&dtype)
		case "shape":
			err = dec.Decode(&shape)
		case "data_offsets":
			err = dec.Decode(&offsets)
		default:
			return bad("unknown field %q", k)
		}
		if err != nil {
			return bad("field %q: %v", k, err)
		}
	}
	if _, err := dec.Token(); err != nil {
		return entry{}, jsonErr(err)
	}
	switch {
	case dtype == nil:
		return bad("missing dtype")
	case shape == nil:
		return bad("missing shape")
	case offsets == nil:
		return bad("missing data_offsets")
	}
	e := entry{name: name, dtype: *dtype, shape: make([]int, len(shape))}
	for i, d := range shape {
		if d < 0 {
			return bad("negative shape %v", shape)
		}
		if d > math.MaxInt {
			return bad("shape %v too large", shape)
		}
		e.shape[i] = int(d)
	}
	if len(offsets) != 2 {
		return bad("data_offsets has %d values, want 2", len(offsets))
	}
	e.begin, e.end = offsets[0], offsets[1]
	if e.begin < 0 || e.end < e.begin {
		return bad("invalid data_offsets [%d, %d]", e.begin, e.end)
	}
	want, err := byteSize(e.dtype, e.shape)
	if err != nil {
		return bad("%v", err)
	}
	if int64(want) != e.end-e.begin {
		return bad("data_offsets [%d, %d] span %d bytes, shape %v of %s needs %d", e.begin, e.end, e.end-e.begin, e.shape, e.dtype, want)
	}
	return e, nil
}

// checkLayout checks that the tensors' byte ranges lie in the buffer and
// cover it exactly: no overlaps, no holes, nothing after the last tensor.
func (r reader) checkLayout(entries []entry, bufStart, bufLen int64) error {
	for _, e := range entries {
		if e.end > bufLen {
			return r.at(bufStart+e.begin, ErrTruncated, "tensor %q data_offsets [%d, %d] run past the %d-byte buffer", e.name, e.begin, e.end, bufLen)
		}
	}
	sorted := slices.Clone(entries)
	slices.SortFunc(sorted, func(a, b entry) int {
		return cmp.Or(cmp.Compare(a.begin, b.begin), cmp.Compare(a.end, b.end), cmp.Compare(a.name, b.name))
	})
	var cursor int64
	prev := ""
	for _, e := range sorted {
		if e.begin < cursor {
			return r.at(bufStart+e.begin, ErrCorrupt, "tensor %q data_offsets [%d, %d] overlap tensor %q", e.name, e.begin, e.end, prev)
		}
		if e.begin > cursor {
			return r.at(bufStart+cursor, ErrCorrupt, "hole in the byte buffer at [%d, %d) before tensor %q", cursor, e.begin, e.name)
		}
		cursor = e.end
		prev = e.name
	}
	if cursor != bufLen {
		return r.at(bufStart+cursor, ErrCorrupt, "%d trailing bytes after the last tensor", bufLen-cursor)
	}
	return nil
}
