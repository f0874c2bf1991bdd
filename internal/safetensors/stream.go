package safetensors

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
)

// ReadStream reads one safetensors file from r, which it reads to the end,
// and validates it like Read. maxSize bounds the whole file (8-byte length,
// header and data) in bytes and must be at least 8; a header or a data
// buffer that would take the file past it is rejected before anything is
// read for it, with an error wrapping ErrTooLarge (and ErrCorrupt).
//
// Memory grows with the bytes that actually arrive, never with what the
// header claims: a short stream whose header announces gigabytes costs
// only its own size (within a small constant factor) before it fails as
// truncated. A stream with bytes after the last tensor is corrupt, as a
// file with trailing bytes is.
func ReadStream(r io.Reader, maxSize int64) (*File, error) {
	const name = "stream"
	if maxSize < 8 {
		return nil, argError("safetensors.ReadStream", "maxSize", "%d, want at least 8", maxSize)
	}
	rd := reader{name: name}
	var lenBuf [8]byte
	if _, err := io.ReadFull(r, lenBuf[:]); err != nil {
		return nil, rd.stream(0, err)
	}
	n := binary.LittleEndian.Uint64(lenBuf[:])
	if n > MaxHeaderSize {
		return nil, rd.at(0, ErrCorrupt, "header length %d exceeds the limit of %d", n, MaxHeaderSize)
	}
	if n > uint64(maxSize-8) {
		return nil, rd.at(0, ErrTooLarge, "header length %d takes the file past the limit of %d bytes", n, maxSize)
	}
	hdr, err := readGrowing(r, int64(n))
	if err != nil {
		return nil, rd.stream(8, err)
	}
	bufStart := 8 + int64(n)
	meta, entries, err := rd.parseHeader(hdr)
	if err != nil {
		return nil, err
	}
	// The buffer must end where the last tensor ends; checkLayout then
	// proves the tensors cover it exactly.
	var bufLen int64
	for _, e := range entries {
		bufLen = max(bufLen, e.end)
	}
	if bufLen > maxSize-bufStart {
		return nil, rd.at(bufStart, ErrTooLarge, "the tensors need %d data bytes, which take the file past the limit of %d bytes", bufLen, maxSize)
	}
	if err := rd.checkLayout(entries, bufStart, bufLen); err != nil {
		return nil, err
	}
	data, err := readGrowing(r, bufLen)
	if err != nil {
		return nil, rd.stream(bufStart, err)
	}
	var one [1]byte
	switch k, err := io.ReadFull(r, one[:]); {
	case k > 0:
		return nil, rd.at(bufStart+bufLen, ErrCorrupt, "trailing bytes after the last tensor")
	case err != io.EOF:
		return nil, rd.stream(bufStart+bufLen, err)
	}
	f := &File{Metadata: meta, Tensors: make(map[string]Tensor, len(entries))}
	for _, e := range entries {
		f.Tensors[e.name] = Tensor{Name: e.name, Dtype: e.dtype, Shape: e.shape, Data: data[e.begin:e.end:e.end]}
	}
	return f, nil
}

// ErrTooLarge is wrapped by ReadStream when the file would exceed the
// caller's size limit. It wraps ErrCorrupt.
var ErrTooLarge = fmt.Errorf("over the size limit: %w", ErrCorrupt)

// readGrowing reads exactly n bytes from r into a buffer that grows as the
// bytes arrive (by doubling from 64 KiB), so a stream that ends early
// costs about its own length, not n.
func readGrowing(r io.Reader, n int64) ([]byte, error) {
	const first = 64 << 10
	if n <= first {
		b := make([]byte, n)
		_, err := io.ReadFull(r, b)
		return b, err
	}
	var buf bytes.Buffer
	buf.Grow(first)
	got, err := io.CopyN(&buf, r, n)
	if got == n {
		return buf.Bytes(), nil
	}
	if err == nil || err == io.EOF {
		err = io.ErrUnexpectedEOF
	}
	return nil, err
}

func (r reader) stream(off int64, err error) error {
	if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
		return r.at(off, ErrTruncated, "stream ends early")
	}
	return fmt.Errorf("safetensors: %s: byte offset %d: %w", r.name, off, err)
}
