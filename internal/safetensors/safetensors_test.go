package safetensors

import (
	"bytes"
	"encoding/binary"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// The byte layouts in these tests are assembled by hand from the format
// description in the safetensors project's README (recalled from memory):
// 8 bytes N (unsigned little-endian 64-bit), N bytes of UTF-8 JSON header
// mapping tensor names to {"dtype", "shape", "data_offsets": [BEGIN, END]}
// with offsets relative to the start of the byte buffer, an optional
// "__metadata__" string-to-string map, trailing space padding allowed, then
// the byte buffer, little-endian and row-major, fully covered with no holes.

// assemble builds a file: LE uint64 header length, header, buffer.
func assemble(header string, buffer []byte) []byte {
	out := make([]byte, 8, 8+len(header)+len(buffer))
	binary.LittleEndian.PutUint64(out, uint64(len(header)))
	out = append(out, header...)
	return append(out, buffer...)
}

func le32(v ...float32) []byte {
	var b []byte
	for _, x := range v {
		b = binary.LittleEndian.AppendUint32(b, math.Float32bits(x))
	}
	return b
}

func le64(v ...float64) []byte {
	var b []byte
	for _, x := range v {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(x))
	}
	return b
}

func TestReadHandAssembled(t *testing.T) {
	// Keys in no particular order, metadata last, no padding: a reader must
	// not rely on our writer's layout.
	header := `{"w":{"dtype":"F32","shape":[2,2],"data_offsets":[16,32]},` +
		`"b":{"shape":[3],"dtype":"F64","data_offsets":[32,56]},` +
		`"steps":{"dtype":"I64","shape":[],"data_offsets":[0,8]},` +
		`"ids":{"dtype":"I32","shape":[2],"data_offsets":[8,16]},` +
		`"empty":{"dtype":"F32","shape":[0,4],"data_offsets":[56,56]},` +
		`"__metadata__":{"format":"lowerbound","beta":"0.5"}}`
	var buf []byte
	buf = binary.LittleEndian.AppendUint64(buf, 0xfffffffffffffff9)          // steps: -7
	buf = binary.LittleEndian.AppendUint32(buf, 3)                           // ids[0]
	buf = binary.LittleEndian.AppendUint32(buf, uint32(math.MaxUint32))      // ids[1] = -1
	buf = append(buf, le32(1.5, -2.25, 0, 1e-3)...)                          // w, row-major
	buf = append(buf, le64(math.Pi, -1e300, math.SmallestNonzeroFloat64)...) // b
	f, err := ReadBytes(assemble(header, buf))
	if err != nil {
		t.Fatal(err)
	}
	if got := f.Names(); !slices.Equal(got, []string{"b", "empty", "ids", "steps", "w"}) {
		t.Errorf("names %v", got)
	}
	if f.Metadata["format"] != "lowerbound" || f.Metadata["beta"] != "0.5" || len(f.Metadata) != 2 {
		t.Errorf("metadata %v", f.Metadata)
	}
	w, _ := f.Tensor("w")
	ws, err := w.Float32s()
	if err != nil || !slices.Equal(ws, []float32{1.5, -2.25, 0, 1e-3}) || !slices.Equal(w.Shape, []int{2, 2}) {
		t.Errorf("w = %v %v (%v)", ws, w.Shape, err)
	}
	b, _ := f.Tensor("b")
	bs, err := b.Float64s()
	if err != nil || !slices.Equal(bs, []float64{math.Pi, -1e300, math.SmallestNonzeroFloat64}) {
		t.Errorf("b = %v (%v)", bs, err)
	}
	steps, _ := f.Tensor("steps")
	ss, err := steps.Int64s()
	if err != nil || !slices.Equal(ss, []int64{-7}) || len(steps.Shape) != 0 || steps.NumElements() != 1 {
		t.Errorf("steps = %v shape %v (%v)", ss, steps.Shape, err)
	}
	ids, _ := f.Tensor("ids")
	is, err := ids.Int32s()
	if err != nil || !slices.Equal(is, []int32{3, -1}) {
		t.Errorf("ids = %v (%v)", is, err)
	}
	empty, _ := f.Tensor("empty")
	if es, err := empty.Float32s(); err != nil || len(es) != 0 || !slices.Equal(empty.Shape, []int{0, 4}) {
		t.Errorf("empty = %v %v (%v)", es, empty.Shape, err)
	}
	if _, err := f.Tensor("missing"); !errors.Is(err, ErrNotFound) {
		t.Errorf("missing: %v", err)
	}
	if _, err := w.Float64s(); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("F32 as Float64s: %v", err)
	}
	// Header padded with spaces (allowed by the format) reads the same.
	padded := header + "      "
	if _, err := ReadBytes(assemble(padded, buf)); err != nil {
		t.Errorf("padded header: %v", err)
	}
}

func TestWriteExactBytes(t *testing.T) {
	// The bytes our writer must produce, spelled out by hand: tensors in name
	// order in the buffer, header keys sorted (including each entry's
	// fields), no whitespace, padded with spaces to a multiple of 8.
	a, _ := FromFloat32("a", []int{2}, []float32{1, -2})
	bb, _ := FromFloat64("bb", []int{1, 1}, []float64{0.5})
	header := `{"__metadata__":{"k":"v<&>"},"a":{"data_offsets":[0,8],"dtype":"F32","shape":[2]},` +
		`"bb":{"data_offsets":[8,16],"dtype":"F64","shape":[1,1]}}`
	for len(header)%8 != 0 {
		header += " "
	}
	want := assemble(header, append(le32(1, -2), le64(0.5)...))
	var got bytes.Buffer
	// Pass the tensors out of order: the writer sorts.
	if err := Write(&got, []Tensor{bb, a}, map[string]string{"k": "v<&>"}); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got.Bytes(), want) {
		t.Errorf("got\n%q\nwant\n%q", got.Bytes(), want)
	}
	// Scalars are written with shape [], nil metadata with no __metadata__.
	s := Tensor{Name: "s", Dtype: I64, Data: make([]byte, 8)}
	got.Reset()
	if err := Write(&got, []Tensor{s}, nil); err != nil {
		t.Fatal(err)
	}
	wantHdr := `{"s":{"data_offsets":[0,8],"dtype":"I64","shape":[]}}`
	for len(wantHdr)%8 != 0 {
		wantHdr += " "
	}
	if want := assemble(wantHdr, make([]byte, 8)); !bytes.Equal(got.Bytes(), want) {
		t.Errorf("scalar: got %q want %q", got.Bytes(), want)
	}
}

func TestRoundTripBits(t *testing.T) {
	f32 := []float32{
		0, float32(math.Copysign(0, -1)), float32(math.Inf(1)), float32(math.Inf(-1)),
		math.Float32frombits(0x7fc00001), // quiet NaN with a payload
		math.Float32frombits(0x7f800001), // signalling NaN
		math.Float32frombits(0xffc12345), // negative NaN with a payload
		math.SmallestNonzeroFloat32, math.MaxFloat32, -1.0 / 3,
	}
	f64 := []float64{
		0, math.Copysign(0, -1), math.Inf(1), math.Inf(-1),
		math.Float64frombits(0x7ff8000000000001),
		math.Float64frombits(0x7ff0000000000001),
		math.Float64frombits(0xfff8dead0000beef),
		math.SmallestNonzeroFloat64, math.MaxFloat64, -1.0 / 3,
	}
	t32, err := FromFloat32("enc/w", []int{2, 5}, f32)
	if err != nil {
		t.Fatal(err)
	}
	t64, err := FromFloat64("dec/w", []int{5, 1, 2}, f64)
	if err != nil {
		t.Fatal(err)
	}
	ti, _ := FromInt64("step", nil, []int64{math.MinInt64})
	tz, _ := FromFloat32("zero", []int{3, 0}, nil)
	meta := map[string]string{"schedule": `{"kind":"constant"}`, "": "empty key", "ünï": "cödé"}
	var buf bytes.Buffer
	if err := Write(&buf, []Tensor{t32, t64, ti, tz}, meta); err != nil {
		t.Fatal(err)
	}
	f, err := ReadBytes(buf.Bytes())
	if err != nil {
		t.Fatal(err)
	}
	g32, _ := f.Tensors["enc/w"].Float32s()
	for i := range f32 {
		if math.Float32bits(g32[i]) != math.Float32bits(f32[i]) {
			t.Errorf("f32[%d]: bits %#x, want %#x", i, math.Float32bits(g32[i]), math.Float32bits(f32[i]))
		}
	}
	g64, _ := f.Tensors["dec/w"].Float64s()
	for i := range f64 {
		if math.Float64bits(g64[i]) != math.Float64bits(f64[i]) {
			t.Errorf("f64[%d]: bits %#x, want %#x", i, math.Float64bits(g64[i]), math.Float64bits(f64[i]))
		}
	}
	if gi, _ := f.Tensors["step"].Int64s(); !slices.Equal(gi, []int64{math.MinInt64}) {
		t.Errorf("step %v", gi)
	}
	if !slices.Equal(f.Tensors["dec/w"].Shape, []int{5, 1, 2}) || !slices.Equal(f.Tensors["zero"].Shape, []int{3, 0}) {
		t.Errorf("shapes %v %v", f.Tensors["dec/w"].Shape, f.Tensors["zero"].Shape)
	}
	if len(f.Metadata) != len(meta) {
		t.Errorf("metadata %v", f.Metadata)
	}
	for k, v := range meta {
		if f.Metadata[k] != v {
			t.Errorf("metadata[%q] = %q, want %q", k, f.Metadata[k], v)
		}
	}
	// Writing what was read gives the same bytes.
	var again bytes.Buffer
	if err := Write(&again, f.List(), f.Metadata); err != nil || !bytes.Equal(again.Bytes(), buf.Bytes()) {
		t.Errorf("rewrite differs (%v)", err)
	}
	// Data of a read tensor cannot grow into its neighbour.
	w := f.Tensors["dec/w"]
	_ = append(w.Data, 0xff)
	if g, _ := f.Tensors["enc/w"].Float32s(); math.Float32bits(g[0]) != 0 {
		t.Errorf("append to one tensor's data changed another")
	}
}

func TestWriteRejects(t *testing.T) {
	good, _ := FromFloat32("x", []int{1}, []float32{1})
	cases := []struct {
		name    string
		tensors []Tensor
		meta    map[string]string
		want    string
	}{
		{"empty name", []Tensor{{Dtype: F32, Shape: []int{1}, Data: make([]byte, 4)}}, nil, "empty tensor name"},
		{"reserved", []Tensor{{Name: "__metadata__", Dtype: F32, Shape: []int{1}, Data: make([]byte, 4)}}, nil, "reserved"},
		{"duplicate", []Tensor{good, good}, nil, "duplicate"},
		{"dtype", []Tensor{{Name: "y", Dtype: "F128", Shape: []int{1}, Data: make([]byte, 16)}}, nil, "unknown dtype"},
		{"negative", []Tensor{{Name: "y", Dtype: F32, Shape: []int{-1}}}, nil, "negative"},
		{"size", []Tensor{{Name: "y", Dtype: F32, Shape: []int{2}, Data: make([]byte, 4)}}, nil, "needs 8"},
		{"overflow", []Tensor{{Name: "y", Dtype: F64, Shape: []int{math.MaxInt / 2, 4}}}, nil, "overflows"},
		{"utf8 name", []Tensor{{Name: "\xff", Dtype: F32, Shape: []int{1}, Data: make([]byte, 4)}}, nil, "UTF-8"},
		{"utf8 meta", []Tensor{good}, map[string]string{"k": "\xfe"}, "UTF-8"},
	}
	for _, c := range cases {
		var buf bytes.Buffer
		err := Write(&buf, c.tensors, c.meta)
		if !errors.Is(err, ErrInvalidArgument) || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: err %v, want ErrInvalidArgument with %q", c.name, err, c.want)
		}
		if buf.Len() != 0 {
			t.Errorf("%s: %d bytes written despite the error", c.name, buf.Len())
		}
	}
	if _, err := FromFloat32("x", []int{2, 2}, []float32{1}); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("FromFloat32 size mismatch: %v", err)
	}
	if _, err := FromFloat64("x", []int{-2}, nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("FromFloat64 negative: %v", err)
	}
}

// valid returns a small valid file from the writer (checked against the
// hand-assembled bytes in TestWriteExactBytes).
func valid(t testing.TB) []byte {
	a, _ := FromFloat32("a", []int{2}, []float32{1, 2})
	b, _ := FromFloat64("b", []int{1}, []float64{3})
	var buf bytes.Buffer
	if err := Write(&buf, []Tensor{a, b}, map[string]string{"k": "v"}); err != nil {
		t.Fatal(err)
	}
	return buf.Bytes()
}

func TestTruncatedAtEveryLength(t *testing.T) {
	full := valid(t)
	if _, err := ReadBytes(full); err != nil {
		t.Fatal(err)
	}
	for n := 0; n < len(full); n++ {
		_, err := ReadBytes(full[:n])
		if !errors.Is(err, ErrTruncated) || !errors.Is(err, ErrCorrupt) {
			t.Errorf("length %d of %d: err %v, want ErrTruncated", n, len(full), err)
		}
	}
}

func TestReadCorrupt(t *testing.T) {
	f32 := `{"dtype":"F32","shape":[2],"data_offsets":[0,8]}`
	data := le32(1, 2)
	withLen := func(n uint64, rest string) []byte {
		b := binary.LittleEndian.AppendUint64(nil, n)
		return append(b, rest...)
	}
	cases := []struct {
		name  string
		file  []byte
		trunc bool   // want ErrTruncated
		want  string // substring of the message
	}{
		{"short", []byte{1, 2, 3}, true, "shorter than the 8-byte"},
		{"absurd header", withLen(1<<40, "{}"), false, "exceeds the limit"},
		{"header past end", withLen(100, "{}"), true, "runs past the end"},
		{"empty header", assemble("", nil), false, "does not start with '{'"},
		{"leading space", assemble(` {"a":`+f32+`}`, data), false, "does not start with '{'"},
		{"not json", assemble(`{"a":`, data), false, "invalid header JSON"},
		{"not object", assemble(`[1,2]`, nil), false, "does not start with '{'"},
		{"garbage after json", assemble(`{"a":`+f32+`}x`, data), false, "after the JSON object"},
		{"tab padding", assemble(`{"a":`+f32+"}\t", data), false, "after the JSON object"},
		{"bad utf8", assemble("{\"\xff\":"+f32+`}`, data), false, "UTF-8"},
		{"duplicate tensor", assemble(`{"a":`+f32+`,"a":`+f32+`}`, data), false, `duplicate header key "a"`},
		{"unknown dtype", assemble(`{"a":{"dtype":"F33","shape":[2],"data_offsets":[0,8]}}`, data), false, `"a"`},
		{"negative shape", assemble(`{"a":{"dtype":"F32","shape":[-2],"data_offsets":[0,8]}}`, data), false, "negative shape"},
		{"float shape", assemble(`{"a":{"dtype":"F32","shape":[2.0],"data_offsets":[0,8]}}`, data), false, `field "shape"`},
		{"shape mismatch", assemble(`{"a":{"dtype":"F32","shape":[3],"data_offsets":[0,8]}}`, data), false, "needs 12"},
		{"dtype mismatch", assemble(`{"a":{"dtype":"F64","shape":[2],"data_offsets":[0,8]}}`, data), false, "needs 16"},
		{"missing dtype", assemble(`{"a":{"shape":[2],"data_offsets":[0,8]}}`, data), false, "missing dtype"},
		{"missing shape", assemble(`{"a":{"dtype":"F32","data_offsets":[0,8]}}`, data), false, "missing shape"},
		{"null offsets", assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":null}}`, data), false, "missing data_offsets"},
		{"three offsets", assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8,9]}}`, data), false, "want 2"},
		{"reversed offsets", assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":[8,0]}}`, data), false, "invalid data_offsets"},
		{"negative offset", assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":[-8,0]}}`, data), false, "invalid data_offsets"},
		{"unknown field", assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8],"x":1}}`, data), false, `unknown field "x"`},
		{"duplicate field", assemble(`{"a":{"dtype":"F32","dtype":"F32","shape":[2],"data_offsets":[0,8]}}`, data), false, `duplicate field "dtype"`},
		{"entry not object", assemble(`{"a":[1]}`, data), false, "not an object"},
		{"metadata not object", assemble(`{"__metadata__":"x"}`, nil), false, "__metadata__ is not an object"},
		{"metadata number", assemble(`{"__metadata__":{"k":1}}`, nil), false, `value of "k" is not a string`},
		{"metadata nested", assemble(`{"__metadata__":{"k":{}}}`, nil), false, `value of "k" is not a string`},
		{"metadata duplicate", assemble(`{"__metadata__":{"k":"1","k":"2"}}`, nil), false, `duplicate __metadata__ key "k"`},
		{"offsets past buffer", assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":[4,12]}}`, data), true, "run past"},
		{"hole", assemble(`{"a":{"dtype":"F32","shape":[1],"data_offsets":[4,8]}}`, data), false, "hole"},
		{"overlap", assemble(`{"a":`+f32+`,"b":{"dtype":"F32","shape":[1],"data_offsets":[4,8]}}`, data), false, `overlap tensor "a"`},
		{"zero-size inside", assemble(`{"a":`+f32+`,"z":{"dtype":"F32","shape":[0],"data_offsets":[4,4]}}`, data), false, "overlap"},
		{"trailing bytes", assemble(`{"a":`+f32+`}`, append(data, 0)), false, "1 trailing bytes"},
		{"no tensors but data", assemble(`{}`, []byte{0}), false, "trailing"},
		{"shape overflow", assemble(`{"a":{"dtype":"F64","shape":[4611686018427387904,4],"data_offsets":[0,8]}}`, data), false, "overflows"},
		{"shape beyond int64", assemble(`{"a":{"dtype":"F64","shape":[18446744073709551616],"data_offsets":[0,8]}}`, data), false, `field "shape"`},
	}
	for _, c := range cases {
		_, err := ReadBytes(c.file)
		if !errors.Is(err, ErrCorrupt) {
			t.Errorf("%s: err %v, want ErrCorrupt", c.name, err)
			continue
		}
		if c.trunc != errors.Is(err, ErrTruncated) {
			t.Errorf("%s: ErrTruncated = %v, want %v (%v)", c.name, !c.trunc, c.trunc, err)
		}
		if !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: error %q does not contain %q", c.name, err, c.want)
		}
		if !strings.Contains(err.Error(), "byte offset") {
			t.Errorf("%s: error %q names no byte offset", c.name, err)
		}
	}
	// Offsets are file offsets: the junk after the header JSON of
	// `{"a":...}x` is at byte 8 + len(`{"a":...}`).
	_, err := ReadBytes(assemble(`{"a":`+f32+`}x`, data))
	if want := "byte offset 62:"; 8+len(`{"a":`+f32+`}`) != 62 || !strings.Contains(err.Error(), want) {
		t.Errorf("error %q, want %q", err, want)
	}
	// Empty tensor list with empty buffer is a valid file.
	if f, err := ReadBytes(assemble(`{}`, nil)); err != nil || len(f.Tensors) != 0 || f.Metadata == nil {
		t.Errorf("empty file: %v %v", f, err)
	}
}

func TestReadFileNamesPath(t *testing.T) {
	dir := t.TempDir()
	p := filepath.Join(dir, "bad.safetensors")
	if err := os.WriteFile(p, []byte{1, 2}, 0o644); err != nil {
		t.Fatal(err)
	}
	_, err := ReadFile(p)
	if !errors.Is(err, ErrTruncated) || !strings.Contains(err.Error(), p) {
		t.Errorf("err %v, want ErrTruncated naming %s", err, p)
	}
	if _, err := ReadFile(filepath.Join(dir, "none")); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("missing file: %v", err)
	}
	if _, err := ReadFile(dir); !errors.Is(err, ErrCorrupt) {
		t.Errorf("directory: %v", err)
	}
}

// shortReader claims a size it cannot deliver.
type shortReader struct{ b []byte }

func (s shortReader) ReadAt(p []byte, off int64) (int, error) {
	return bytes.NewReader(s.b).ReadAt(p, off)
}

func TestReadSizeLie(t *testing.T) {
	full := valid(t)
	_, err := Read(shortReader{full[:len(full)-3]}, int64(len(full)))
	if !errors.Is(err, ErrTruncated) {
		t.Errorf("err %v, want ErrTruncated", err)
	}
	f, err := Read(bytes.NewReader(full), int64(len(full)))
	if err != nil || len(f.Tensors) != 2 {
		t.Errorf("Read: %v %v", f, err)
	}
}

func TestWriteFileAtomic(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "model.safetensors")
	a, _ := FromFloat32("a", []int{3}, []float32{1, 2, 3})
	if err := WriteFile(path, []Tensor{a}, map[string]string{"v": "1"}); err != nil {
		t.Fatal(err)
	}
	old, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if fi, _ := os.Stat(path); fi.Mode().Perm() != 0o644 {
		t.Errorf("new file mode %v, want 0644", fi.Mode().Perm())
	}
	big, _ := FromFloat64("big", []int{100000}, make([]float64, 100000))

	// A writer that fails after some bytes, at several points: in the length,
	// the header, the middle of the data.
	for _, limit := range []int{0, 5, 30, 70000, 500000} {
		err := writeFile(path, []Tensor{big}, nil, func(w io.Writer) io.Writer {
			return &failingWriter{w: w, left: limit}
		})
		if !errors.Is(err, errInjected) {
			t.Fatalf("limit %d: err %v, want the injected error", limit, err)
		}
		if !strings.Contains(err.Error(), path) {
			t.Errorf("limit %d: error %q does not name the path", limit, err)
		}
		assertOnly(t, dir, "model.safetensors")
		if now, _ := os.ReadFile(path); !bytes.Equal(now, old) {
			t.Fatalf("limit %d: old file changed", limit)
		}
	}
	// Invalid tensors: nothing is created.
	if err := WriteFile(path, []Tensor{{Name: "x", Dtype: F32, Shape: []int{2}}}, nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("invalid tensor: %v", err)
	}
	assertOnly(t, dir, "model.safetensors")

	// Rename fails: target is a non-empty directory.
	target := filepath.Join(dir, "sub")
	if err := os.MkdirAll(filepath.Join(target, "keep"), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := WriteFile(target, []Tensor{a}, nil); err == nil {
		t.Errorf("write over a directory succeeded")
	}
	assertOnly(t, dir, "model.safetensors", "sub")

	// Missing directory.
	if err := WriteFile(filepath.Join(dir, "no", "x.safetensors"), []Tensor{a}, nil); err == nil {
		t.Errorf("write into a missing directory succeeded")
	}

	// A successful replace keeps the old permissions and the new content.
	if err := os.Chmod(path, 0o600); err != nil {
		t.Fatal(err)
	}
	if err := WriteFile(path, []Tensor{big}, nil); err != nil {
		t.Fatal(err)
	}
	assertOnly(t, dir, "model.safetensors", "sub")
	if fi, _ := os.Stat(path); fi.Mode().Perm() != 0o600 {
		t.Errorf("replaced file mode %v, want 0600", fi.Mode().Perm())
	}
	f, err := ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if v, _ := f.Tensors["big"].Float64s(); len(v) != 100000 || len(f.Tensors) != 1 {
		t.Errorf("new content not in place")
	}
}

func TestWriteFileReadOnlyDir(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "m.safetensors")
	a, _ := FromFloat32("a", []int{1}, []float32{1})
	if err := WriteFile(path, []Tensor{a}, nil); err != nil {
		t.Fatal(err)
	}
	old, _ := os.ReadFile(path)
	if err := os.Chmod(dir, 0o500); err != nil {
		t.Fatal(err)
	}
	defer os.Chmod(dir, 0o700)
	if probe, err := os.CreateTemp(dir, "probe"); err == nil {
		probe.Close()
		os.Remove(probe.Name())
		t.Skip("directory permissions are not enforced for this user (root); the injected-error test covers atomicity")
	}
	b, _ := FromFloat32("b", []int{1}, []float32{2})
	if err := WriteFile(path, []Tensor{b}, nil); err == nil {
		t.Fatal("write into a read-only directory succeeded")
	}
	if now, _ := os.ReadFile(path); !bytes.Equal(now, old) {
		t.Error("old file changed")
	}
	assertOnly(t, dir, "m.safetensors")
}

var errInjected = errors.New("injected write failure")

type failingWriter struct {
	w    io.Writer
	left int
}

func (f *failingWriter) Write(p []byte) (int, error) {
	if len(p) > f.left {
		n, _ := f.w.Write(p[:f.left])
		f.left = 0
		return n, errInjected
	}
	f.left -= len(p)
	return f.w.Write(p)
}

// assertOnly checks that dir holds exactly the named entries (no temp file).
func assertOnly(t *testing.T, dir string, names ...string) {
	t.Helper()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for _, e := range ents {
		got = append(got, e.Name())
	}
	if !slices.Equal(got, names) {
		t.Errorf("directory holds %v, want %v", got, names)
	}
}
