package dataset

import (
	"bytes"
	"compress/gzip"
	"errors"
	"os"
	"path/filepath"
	"slices"
	"testing"
)

// idxFile builds an IDX file by hand, following the format description on
// the MNIST database page (LeCun, Cortes and Burges, "THE IDX FILE FORMAT";
// recalled from memory): bytes 0-1 are zero, byte 2 is the type code, byte 3
// the number of dimensions, then each dimension as a 4-byte big-endian
// integer, then the data, big-endian. The dimension bytes are written out
// here digit by digit rather than with encoding/binary.
func idxFile(typ byte, dims []uint32, data []byte) []byte {
	b := []byte{0, 0, typ, byte(len(dims))}
	for _, d := range dims {
		b = append(b, byte(d>>24), byte(d>>16), byte(d>>8), byte(d))
	}
	return append(b, data...)
}

func gz(t *testing.T, b []byte) []byte {
	t.Helper()
	var buf bytes.Buffer
	w := gzip.NewWriter(&buf)
	if _, err := w.Write(b); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	return buf.Bytes()
}

// The payload bytes of each case are written by hand from the element
// types' definitions (two's complement integers, IEEE 754 binary32 and
// binary64, most significant byte first).
var idxCases = []struct {
	name string
	typ  byte
	dims []uint32
	data []byte
	want []float64
}{
	{"ubyte", 0x08, []uint32{2, 3}, []byte{0, 1, 127, 128, 200, 255}, []float64{0, 1, 127, 128, 200, 255}},
	{"sbyte", 0x09, []uint32{4}, []byte{0x80, 0xFF, 0x00, 0x7F}, []float64{-128, -1, 0, 127}},
	{"short", 0x0B, []uint32{3}, []byte{0xFF, 0xFE, 0x01, 0x02, 0x7F, 0xFF}, []float64{-2, 258, 32767}},
	{"int", 0x0C, []uint32{2}, []byte{0xFF, 0xFF, 0xFF, 0xFF, 0x01, 0x02, 0x03, 0x04}, []float64{-1, 16909060}},
	{"float", 0x0D, []uint32{3}, []byte{0x3F, 0xC0, 0, 0, 0xC0, 0, 0, 0, 0x3D, 0xCC, 0xCC, 0xCD},
		[]float64{1.5, -2, float64(float32(0.1))}},
	{"double", 0x0E, []uint32{2}, []byte{0xBF, 0xD0, 0, 0, 0, 0, 0, 0, 0x40, 0x08, 0, 0, 0, 0, 0, 0}, []float64{-0.25, 3}},
}

func TestReadIDXTypes(t *testing.T) {
	for _, c := range idxCases {
		raw := idxFile(c.typ, c.dims, c.data)
		for _, zipped := range []bool{false, true} {
			in := raw
			if zipped {
				in = gz(t, raw)
			}
			d, err := ReadIDX(bytes.NewReader(in), c.name)
			if err != nil {
				t.Fatalf("%s (gzip %v): %v", c.name, zipped, err)
			}
			if d.Type != c.typ {
				t.Errorf("%s: type 0x%02x, want 0x%02x", c.name, d.Type, c.typ)
			}
			wantDims := make([]int, len(c.dims))
			for i, v := range c.dims {
				wantDims[i] = int(v)
			}
			if !slices.Equal(d.Dims, wantDims) {
				t.Errorf("%s: dims %v, want %v", c.name, d.Dims, wantDims)
			}
			if !slices.Equal(d.Data, c.want) {
				t.Errorf("%s (gzip %v): data %v, want %v", c.name, zipped, d.Data, c.want)
			}
		}
	}
}

func TestReadIDXCorrupt(t *testing.T) {
	good := idxFile(0x0C, []uint32{3}, []byte{0, 0, 0, 1, 0, 0, 0, 2, 0, 0, 0, 3}) // 8-byte header + 12
	cases := []struct {
		name  string
		in    []byte
		parts []string
	}{
		{"empty", nil, []string{"offset 0:", "header"}},
		{"short header", good[:3], []string{"offset 3:", "header"}},
		{"bad magic", append([]byte{0x50, 0x4B}, good[2:]...), []string{"offset 0:", "bad magic"}},
		{"bad magic second byte", append([]byte{0, 1}, good[2:]...), []string{"offset 0:", "bad magic"}},
		{"unknown type", append([]byte{0, 0, 0x0A}, good[3:]...), []string{"offset 2:", "type code 0x0a"}},
		{"no dims", []byte{0, 0, 0x08, 0}, []string{"offset 3:", "zero dimensions"}},
		{"short dims", good[:6], []string{"offset 6:", "dimensions"}},
		{"data cut mid element", good[:8+6], []string{"offset 14:", "after 1 of 3 elements"}},
		{"data cut at element", good[:8+8], []string{"offset 16:", "after 2 of 3 elements"}},
		{"no data", good[:8], []string{"offset 8:", "after 0 of 3 elements"}},
		{"trailing", append(slices.Clone(good), 9), []string{"offset 20:", "trailing"}},
		{"huge dims", idxFile(0x08, []uint32{1 << 31, 1 << 31}, nil), []string{"offset 8:", "dimension 1"}},
	}
	for _, c := range cases {
		for _, zipped := range []bool{false, true} {
			in := c.in
			if zipped {
				in = gz(t, c.in) // offsets are positions in the decompressed stream
			}
			_, err := ReadIDX(bytes.NewReader(in), "f.idx")
			if err == nil {
				t.Fatalf("%s (gzip %v): no error", c.name, zipped)
			}
			if !errors.Is(err, ErrInvalidData) {
				t.Fatalf("%s: %v does not wrap ErrInvalidData", c.name, err)
			}
			mustErr(t, err, ErrInvalidData, append([]string{"f.idx"}, c.parts...)...)
		}
	}
}

func TestReadIDXBadGzip(t *testing.T) {
	z := gz(t, idxFile(0x08, []uint32{1000}, make([]byte, 1000)))
	// A cut gzip stream: the decompressor runs dry before the data is complete.
	_, err := ReadIDX(bytes.NewReader(z[:len(z)/2]), "cut.gz")
	mustErr(t, err, ErrInvalidData, "cut.gz", "offset")
	// A flipped byte in the trailing CRC-32 is caught once the data is read.
	bad := slices.Clone(z)
	bad[len(bad)-6] ^= 0xFF
	_, err = ReadIDX(bytes.NewReader(bad), "crc.gz")
	mustErr(t, err, ErrInvalidData, "crc.gz", "offset 1008") // 8-byte header (4 + one 4-byte dimension) + 1000 bytes
	// A gzip magic followed by garbage.
	_, err = ReadIDX(bytes.NewReader([]byte{0x1f, 0x8b, 1, 2, 3}), "junk.gz")
	mustErr(t, err, ErrInvalidData, "junk.gz", "gzip")
}

func TestReadIDXImagesAndLabels(t *testing.T) {
	img := idxFile(0x08, []uint32{2, 2, 3}, []byte{0, 51, 102, 153, 204, 255, 255, 0, 0, 0, 0, 128})
	s, err := ReadIDXImages(bytes.NewReader(img), "img", IDXOptions{Scale: 1.0 / 255})
	if err != nil {
		t.Fatal(err)
	}
	if s.Len() != 2 || s.Features() != 6 || !slices.Equal(s.Shape(), []int{1, 2, 3}) {
		t.Fatalf("len %d features %d shape %v", s.Len(), s.Features(), s.Shape())
	}
	if got := s.Row(0); !slices.Equal(got, []float64{0, 51.0 / 255, 102.0 / 255, 153.0 / 255, 204.0 / 255, 1}) {
		t.Fatalf("row 0 = %v", got)
	}
	b, err := ReadIDXImages(bytes.NewReader(img), "img", IDXOptions{Binarize: true, Threshold: 128})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(b.Values(), []float64{0, 0, 0, 1, 1, 1, 1, 0, 0, 0, 0, 1}) {
		t.Fatalf("binarized %v", b.Values())
	}
	one, err := ReadIDXImages(bytes.NewReader(img), "img", IDXOptions{Limit: 1})
	if err != nil || one.Len() != 1 || one.Row(0)[5] != 255 {
		t.Fatalf("limit 1: %v %v", one, err)
	}
	vec, err := ReadIDXImages(bytes.NewReader(idxFile(0x08, []uint32{3}, []byte{1, 2, 3})), "v", IDXOptions{})
	if err != nil || vec.Len() != 3 || !slices.Equal(vec.Shape(), []int{1}) {
		t.Fatalf("1-D file: %v %v", vec, err)
	}

	// A NaN float pixel (0x7FC00000) in record 1, feature 0: element 2,
	// at offset 12 (header 4 + 2 dims * 4) + 2*4 = 20.
	nan := idxFile(0x0D, []uint32{2, 2}, []byte{0, 0, 0, 0, 0, 0, 0, 0, 0x7F, 0xC0, 0, 0, 0, 0, 0, 0})
	_, err = ReadIDXImages(bytes.NewReader(nan), "nan.idx", IDXOptions{})
	mustErr(t, err, ErrInvalidData, "nan.idx", "record 1, feature 0", "offset 20")

	lab := idxFile(0x08, []uint32{4}, []byte{3, 0, 9, 1})
	l, err := ReadIDXLabels(bytes.NewReader(lab), "lab", IDXOptions{Classes: 10})
	if err != nil || !slices.Equal(l, []int{3, 0, 9, 1}) {
		t.Fatalf("labels %v %v", l, err)
	}
	// Label 9 is record 2, at offset 8 (4 + 1 dim * 4) + 2.
	_, err = ReadIDXLabels(bytes.NewReader(lab), "lab", IDXOptions{Classes: 5})
	mustErr(t, err, ErrInvalidData, "lab", "record 2 (offset 10)", "label 9")
	neg := idxFile(0x0B, []uint32{2}, []byte{0, 1, 0xFF, 0xFF})
	_, err = ReadIDXLabels(bytes.NewReader(neg), "neg", IDXOptions{})
	mustErr(t, err, ErrInvalidData, "neg", "record 1 (offset 10)", "label -1")
	_, err = ReadIDXLabels(bytes.NewReader(idxFile(idxCases[4].typ, idxCases[4].dims, idxCases[4].data)), "fl", IDXOptions{})
	mustErr(t, err, ErrInvalidData, "fl", "offset 2", "not an integer type")
	_, err = ReadIDXLabels(bytes.NewReader(img), "img", IDXOptions{})
	mustErr(t, err, ErrInvalidData, "img", "offset 3", "3 dimensions")
	_, err = ReadIDXImages(bytes.NewReader(img), "img", IDXOptions{Limit: -1})
	mustErr(t, err, ErrInvalidArgument, "opt.Limit")
}

func TestLoadIDX(t *testing.T) {
	dir := t.TempDir()
	write := func(name string, b []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, b, 0o644); err != nil {
			t.Fatal(err)
		}
		return p
	}
	img := write("img.gz", gz(t, idxFile(0x08, []uint32{3, 1, 2}, []byte{0, 255, 10, 20, 30, 40})))
	lab := write("lab", idxFile(0x08, []uint32{3}, []byte{1, 0, 2}))
	s, err := LoadIDX(img, lab, IDXOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if s.Len() != 3 || !slices.Equal(s.Shape(), []int{1, 1, 2}) || !slices.Equal(s.Labels(), []int{1, 0, 2}) || s.Classes() != 3 {
		t.Fatalf("len %d shape %v labels %v classes %d", s.Len(), s.Shape(), s.Labels(), s.Classes())
	}
	if !slices.Equal(s.Row(2), []float64{30, 40}) {
		t.Fatalf("row 2 = %v", s.Row(2))
	}
	lim, err := LoadIDX(img, lab, IDXOptions{Limit: 2, Classes: 10})
	if err != nil || lim.Len() != 2 || !slices.Equal(lim.Labels(), []int{1, 0}) || lim.Classes() != 10 {
		t.Fatalf("limit 2: %v %v", lim, err)
	}
	nolab, err := LoadIDX(img, "", IDXOptions{})
	if err != nil || nolab.HasLabels() {
		t.Fatalf("no labels: %v %v", nolab, err)
	}

	short := write("short", idxFile(0x08, []uint32{2}, []byte{1, 0}))
	_, err = LoadIDX(img, short, IDXOptions{})
	mustErr(t, err, ErrInvalidData, "short", "2 records", "img.gz", "has 3")
	// With a limit the counts still come from the headers.
	_, err = LoadIDX(img, short, IDXOptions{Limit: 1})
	mustErr(t, err, ErrInvalidData, "2 records", "has 3")

	_, err = LoadIDX(filepath.Join(dir, "missing"), lab, IDXOptions{})
	if !errors.Is(err, os.ErrNotExist) {
		t.Fatalf("missing file: %v", err)
	}
	_, err = LoadIDX("", lab, IDXOptions{})
	mustErr(t, err, ErrInvalidArgument, "imagesPath")
}
