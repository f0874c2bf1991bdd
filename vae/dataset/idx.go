package dataset

import (
	"bufio"
	"compress/gzip"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
)

// Type codes of the IDX format (third byte of the header).
const (
	IDXUint8   byte = 0x08 // unsigned byte
	IDXInt8    byte = 0x09 // signed byte
	IDXInt16   byte = 0x0B // big-endian 2-byte integer
	IDXInt32   byte = 0x0C // big-endian 4-byte integer
	IDXFloat32 byte = 0x0D // big-endian IEEE 754 single
	IDXFloat64 byte = 0x0E // big-endian IEEE 754 double
)

// idxSize returns the byte size of one element of type code t, or 0 for an
// unknown code.
func idxSize(t byte) int {
	switch t {
	case IDXUint8, IDXInt8:
		return 1
	case IDXInt16:
		return 2
	case IDXInt32, IDXFloat32:
		return 4
	case IDXFloat64:
		return 8
	}
	return 0
}

// idxAllocPerByte and idxFixedBytes state the memory bound of the IDX
// readers (see doc.go): reading a stream allocates at most idxAllocPerByte
// bytes per byte of element data the (decompressed) stream actually holds,
// plus idxFixedBytes of buffers, whatever its header claims. The raw bytes
// are read into a buffer that doubles as they arrive (at most 4 bytes per
// byte, counting every buffer it outgrew), and only a complete read is
// decoded into a float64 slice of exactly the right length (8 bytes per
// element, at most 8 per byte, for one-byte elements).
const (
	idxAllocPerByte = 12
	idxFixedBytes   = 256 << 10
)

// maxElements bounds the product of the non-zero dimensions of a header
// (2^40, far beyond any file this package can hold in memory; less on a
// 32-bit machine), so that no product of dimensions (the element count, the
// values per record) can overflow an int, whatever zero dimensions hide.
const maxElements = min(1<<40, math.MaxInt/8)

// firstChunk is the capacity, in bytes, the raw data buffer starts with;
// it then doubles as bytes actually arrive, never beyond what the header
// claims.
const firstChunk = 32 << 10

// IDX is the content of one IDX file: its type code, its dimensions (the
// first one counts records) and every element converted to float64, which
// holds all six element types exactly.
type IDX struct {
	Type byte
	Dims []int
	Data []float64
}

// Offset returns the byte offset, in the (decompressed) file, of element k.
func (d *IDX) Offset(k int) int64 {
	return int64(4+4*len(d.Dims)) + int64(k)*int64(idxSize(d.Type))
}

// ReadIDX reads one IDX file from r. name is used in error messages (usually
// the path). A stream that begins with the gzip magic bytes 1f 8b is
// decompressed transparently.
//
// The format: two zero bytes; a type code byte (see IDXUint8 ...); a byte
// giving the number of dimensions; each dimension as a big-endian uint32;
// then the elements, big-endian, last dimension varying fastest. Errors
// wrap ErrInvalidData and give the byte offset (into the decompressed
// stream) of the problem: a bad magic at offset 0, an unknown type code at
// offset 2, truncated data at the offset where the stream ended, or bytes
// left over after the last element.
//
// The product of the non-zero dimensions may not exceed 2^40; a header
// beyond that is an error naming the offset of the dimension that crosses
// it. Memory follows the data, not the header's claim: reading allocates
// at most 12 bytes per byte of element data the (decompressed) stream
// actually holds, plus 256 KiB of buffers, so a small file never costs more
// than a small multiple of its decompressed size, whatever its header
// claims. (The raw bytes are read into a buffer that doubles as they
// arrive, then decoded into float64 values, 8 bytes each.)
func ReadIDX(r io.Reader, name string) (*IDX, error) {
	d, _, err := readIDX("dataset.ReadIDX", r, name, 0)
	return d, err
}

// readIDX reads an IDX stream; limit > 0 reads only the first limit records
// (and skips the trailing-bytes check). It returns the data read, with
// Dims[0] set to the number of records read, and the record count the
// header claims.
func readIDX(where string, r io.Reader, name string, limit int) (*IDX, int, error) {
	if r == nil {
		return nil, 0, argError(where, "r", "nil reader")
	}
	br := bufio.NewReaderSize(r, 1<<16)
	var src io.Reader = br
	if magic, err := br.Peek(2); err == nil && magic[0] == 0x1f && magic[1] == 0x8b {
		zr, err := gzip.NewReader(br)
		if err != nil {
			return nil, 0, dataError(where, "%s: gzip header: %v", name, err)
		}
		defer zr.Close()
		src = zr
	}
	var off int64
	fail := func(at int64, format string, a ...any) error {
		return dataError(where, "%s: offset %d: %s", name, at, fmt.Sprintf(format, a...))
	}
	// readFull reads len(b) bytes; on a short read it reports what ended.
	readFull := func(b []byte, what string) error {
		m, err := io.ReadFull(src, b)
		off += int64(m)
		if err == nil {
			return nil
		}
		if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
			return fail(off, "unexpected end of file in %s", what)
		}
		return fail(off, "reading %s: %v", what, err)
	}

	var head [4]byte
	if err := readFull(head[:], "header"); err != nil {
		return nil, 0, err
	}
	if head[0] != 0 || head[1] != 0 {
		return nil, 0, fail(0, "bad magic %02x %02x, want 00 00 (not an IDX file)", head[0], head[1])
	}
	typ := head[2]
	size := idxSize(typ)
	if size == 0 {
		return nil, 0, fail(2, "unknown type code 0x%02x", typ)
	}
	nd := int(head[3])
	if nd == 0 {
		return nil, 0, fail(3, "zero dimensions")
	}
	dimBytes := make([]byte, 4*nd)
	if err := readFull(dimBytes, "dimensions"); err != nil {
		return nil, 0, err
	}
	dims := make([]int, nd)
	// nonZero is the product of the non-zero dimensions so far: bounding it
	// bounds every product of dimensions, even those a zero would hide from
	// the element count (such as the values per record of a file of zero
	// records).
	nonZero := int64(1)
	for i := range dims {
		v := int64(binary.BigEndian.Uint32(dimBytes[4*i:]))
		if v != 0 && nonZero > maxElements/v {
			return nil, 0, fail(int64(4+4*i), "dimension %d (%d): the product of the non-zero dimensions exceeds %d", i, v, int64(maxElements))
		}
		dims[i] = int(v)
		if v != 0 {
			nonZero *= v
		}
	}
	claimed := dims[0]
	per := int64(1)
	for _, v := range dims[1:] {
		per *= int64(v)
	}
	total := int64(claimed) * per
	want := total
	if limit > 0 && int64(limit) < int64(claimed) {
		want = int64(limit) * per
		dims[0] = limit
	}
	// The header's claim costs nothing by itself: the raw bytes go into a
	// buffer that starts small and doubles as they arrive (never beyond the
	// claim, so a file that is what it says fills it exactly), and only a
	// complete read is decoded, into a slice of exactly the right length.
	hdr := int64(4 + 4*nd)
	wantBytes := want * int64(size)
	raw := make([]byte, 0, min(wantBytes, firstChunk))
	for int64(len(raw)) < wantBytes {
		if len(raw) == cap(raw) {
			grown := make([]byte, len(raw), min(wantBytes, 2*int64(cap(raw))))
			copy(grown, raw)
			raw = grown
		}
		m, err := io.ReadFull(src, raw[len(raw):cap(raw)])
		raw = raw[:len(raw)+m]
		if err != nil {
			got := len(raw) / size
			if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
				return nil, 0, fail(hdr+int64(len(raw)), "unexpected end of data after %d of %d elements (element size %d bytes)", got, want, size)
			}
			return nil, 0, fail(hdr+int64(got*size), "reading data: %v", err)
		}
	}
	data := decodeIDX(make([]float64, 0, want), typ, raw)
	end := hdr + wantBytes
	if want == total {
		var one [1]byte
		m, err := io.ReadFull(src, one[:])
		if m > 0 {
			return nil, 0, fail(end, "trailing bytes after the last of %d elements", total)
		}
		if !errors.Is(err, io.EOF) {
			return nil, 0, fail(end, "after the last element: %v", err)
		}
	}
	return &IDX{Type: typ, Dims: dims, Data: data}, claimed, nil
}

// decodeIDX appends the big-endian elements in b (a whole number of them) to
// dst as float64.
func decodeIDX(dst []float64, typ byte, b []byte) []float64 {
	switch typ {
	case IDXUint8:
		for _, v := range b {
			dst = append(dst, float64(v))
		}
	case IDXInt8:
		for _, v := range b {
			dst = append(dst, float64(int8(v)))
		}
	case IDXInt16:
		for i := 0; i+2 <= len(b); i += 2 {
			dst = append(dst, float64(int16(binary.BigEndian.Uint16(b[i:]))))
		}
	case IDXInt32:
		for i := 0; i+4 <= len(b); i += 4 {
			dst = append(dst, float64(int32(binary.BigEndian.Uint32(b[i:]))))
		}
	case IDXFloat32:
		for i := 0; i+4 <= len(b); i += 4 {
			dst = append(dst, float64(math.Float32frombits(binary.BigEndian.Uint32(b[i:]))))
		}
	case IDXFloat64:
		for i := 0; i+8 <= len(b); i += 8 {
			dst = append(dst, math.Float64frombits(binary.BigEndian.Uint64(b[i:])))
		}
	}
	return dst
}

// IDXOptions controls ReadIDXImages, ReadIDXLabels and LoadIDX. The zero
// value reads everything, keeps raw values and infers the class count.
type IDXOptions struct {
	// Scale multiplies every image value; 0 means 1 (raw values). Use
	// 1.0/255 to map byte pixels to [0, 1].
	Scale float64
	// Binarize, when set, maps each image value (after Scale) to 1 when it
	// is at least Threshold and to 0 otherwise, in place while loading (the
	// same result as Set.Binarize without a second copy of the data).
	Binarize  bool
	Threshold float64
	// Classes, when positive, is the number of classes: labels must lie in
	// [0, Classes). Zero accepts any label in [0, MaxClasses) and infers the
	// count as the largest label plus one. It may not exceed MaxClasses.
	Classes int
	// Limit, when positive, reads only the first Limit records of each
	// file (the rest of the file is not read or checked).
	Limit int
}

func (o IDXOptions) check(where string) error {
	if math.IsNaN(o.Scale) || math.IsInf(o.Scale, 0) {
		return argError(where, "opt.Scale", "%v is not finite", o.Scale)
	}
	if math.IsNaN(o.Threshold) {
		return argError(where, "opt.Threshold", "NaN")
	}
	if o.Classes < 0 || o.Classes > MaxClasses {
		return argError(where, "opt.Classes", "class count %d not in [0, %d] (MaxClasses)", o.Classes, MaxClasses)
	}
	if o.Limit < 0 {
		return argError(where, "opt.Limit", "negative limit %d", o.Limit)
	}
	return nil
}

// ReadIDXImages reads an IDX file of records (images or any other vectors)
// into a Set. The first dimension counts records; the rest form each
// record's shape, with a file of dimensions (N, rows, cols) read as records
// of shape [1, rows, cols] (one channel) and a file of dimension (N) as
// records of one feature. Values are multiplied by opt.Scale; a value that
// is not finite is an error naming the file, record, feature and byte offset.
// opt.Binarize then thresholds the values.
func ReadIDXImages(r io.Reader, name string, opt IDXOptions) (*Set, error) {
	s, _, err := readImages("dataset.ReadIDXImages", r, name, opt)
	return s, err
}

func readImages(where string, r io.Reader, name string, opt IDXOptions) (*Set, int, error) {
	if err := opt.check(where); err != nil {
		return nil, 0, err
	}
	d, claimed, err := readIDX(where, r, name, opt.Limit)
	if err != nil {
		return nil, 0, err
	}
	n := d.Dims[0]
	shape := d.Dims[1:]
	switch len(d.Dims) {
	case 1:
		shape = []int{1}
	case 3:
		shape = []int{1, d.Dims[1], d.Dims[2]}
	}
	f := 1
	for _, v := range shape {
		f *= v
	}
	if f == 0 {
		return nil, 0, dataError(where, "%s: offset 4: records of shape %v hold no values", name, d.Dims[1:])
	}
	if opt.Scale != 0 && opt.Scale != 1 {
		for k := range d.Data {
			d.Data[k] *= opt.Scale
		}
	}
	for k, v := range d.Data {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil, 0, dataError(where, "%s: record %d, feature %d (offset %d): value %v is not finite", name, k/f, k%f, d.Offset(k), v)
		}
		if opt.Binarize {
			if v >= opt.Threshold {
				d.Data[k] = 1
			} else {
				d.Data[k] = 0
			}
		}
	}
	s := &Set{x: d.Data, n: n, f: f, shape: shape}
	return s, claimed, nil
}

// ReadIDXLabels reads a one-dimensional IDX file of integer class labels
// (type uint8, int8, int16 or int32). A label that is negative, or not
// below opt.Classes when that is set, is an error naming the file, the
// record and the byte offset.
func ReadIDXLabels(r io.Reader, name string, opt IDXOptions) ([]int, error) {
	l, _, err := readLabels("dataset.ReadIDXLabels", r, name, opt)
	return l, err
}

func readLabels(where string, r io.Reader, name string, opt IDXOptions) ([]int, int, error) {
	if err := opt.check(where); err != nil {
		return nil, 0, err
	}
	d, claimed, err := readIDX(where, r, name, opt.Limit)
	if err != nil {
		return nil, 0, err
	}
	if d.Type == IDXFloat32 || d.Type == IDXFloat64 {
		return nil, 0, dataError(where, "%s: offset 2: type code 0x%02x is not an integer type, labels must be integers", name, d.Type)
	}
	if len(d.Dims) != 1 {
		return nil, 0, dataError(where, "%s: offset 3: %d dimensions, labels need 1", name, len(d.Dims))
	}
	labels := make([]int, len(d.Data))
	for i, v := range d.Data {
		l := int(v)
		if msg := labelProblem(l, opt.Classes); msg != "" {
			return nil, 0, dataError(where, "%s: record %d (offset %d): %s", name, i, d.Offset(i), msg)
		}
		labels[i] = l
	}
	return labels, claimed, nil
}

// LoadIDX reads an images file and, when labelsPath is not empty, the
// matching labels file into one labelled Set (see ReadIDXImages and
// ReadIDXLabels; either file may be gzipped). The two files must hold the
// same number of records.
func LoadIDX(imagesPath, labelsPath string, opt IDXOptions) (*Set, error) {
	const where = "dataset.LoadIDX"
	if imagesPath == "" {
		return nil, argError(where, "imagesPath", "empty path")
	}
	if err := opt.check(where); err != nil {
		return nil, err
	}
	fi, err := os.Open(imagesPath)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	s, nImg, err := readImages(where, fi, imagesPath, opt)
	fi.Close()
	if err != nil {
		return nil, err
	}
	if labelsPath == "" {
		return s, nil
	}
	fl, err := os.Open(labelsPath)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	labels, nLab, err := readLabels(where, fl, labelsPath, opt)
	fl.Close()
	if err != nil {
		return nil, err
	}
	if nImg != nLab || len(labels) != s.n {
		return nil, dataError(where, "%s: offset 4: %d records, but %s (offset 4) has %d", labelsPath, nLab, imagesPath, nImg)
	}
	classes, err := checkLabels(where, labelsPath, labels, opt.Classes)
	if err != nil {
		return nil, err
	}
	s.labels, s.classes = labels, classes
	return s, nil
}
