package dataset

import (
	"bytes"
	"compress/gzip"
	"errors"
	"fmt"
	"io"
	"strings"
	"testing"
)

// The fuzz targets of the IDX and CSV readers. Each run checks that the
// reader neither panics nor allocates beyond its documented bound (doc.go:
// 12 bytes per byte the decompressed IDX stream holds plus 256 KiB;
// csvBytesPerByte bytes per CSV input byte plus csvFixedBytes), and that
// whatever it returns is consistent. The seed corpus holds the bad inputs
// of issue 8, items 1-3, and a few good files.
//
// CI runs each target briefly:
//
//	go test -run '^$' -fuzz '^FuzzReadIDX$' -fuzztime 5s ./vae/dataset
//
// and a long run is the same with -fuzztime 3m (see the report in
// DEVELOPERS.md).

// csvBytesPerByte and csvFixedBytes bound what ReadCSV allocates for an
// input of n bytes: csvBytesPerByte*n + csvFixedBytes (stated in the
// ReadCSV documentation). Rows of numbers cost about 20 bytes per input
// byte (a float64 per value of at least two bytes, in a slice that
// doubles). The worst input is a long line of empty fields, one byte each:
// encoding/csv keeps a string header, a field index and a field position
// per field in slices that double, about 140 bytes per field (found by
// FuzzReadCSV: 1236 tabs cost 175856 bytes).
const (
	csvBytesPerByte = 256
	csvFixedBytes   = 64 << 10
)

// decompressedLen returns how many bytes the IDX reader sees in b: b
// itself, or what gzip yields before it ends or fails when b starts with
// the gzip magic bytes. It is counted outside the measured call.
func decompressedLen(b []byte) int {
	if len(b) < 2 || b[0] != 0x1f || b[1] != 0x8b {
		return len(b)
	}
	zr, err := gzip.NewReader(bytes.NewReader(b))
	if err != nil {
		return 0
	}
	n, _ := io.Copy(io.Discard, io.LimitReader(zr, 1<<30))
	return int(n)
}

// gzipBytes compresses b for the seed corpus.
func gzipBytes(b []byte) []byte {
	var buf bytes.Buffer
	w := gzip.NewWriter(&buf)
	_, _ = w.Write(b)
	_ = w.Close()
	return buf.Bytes()
}

// idxSeeds are the IDX inputs of the seed corpus: issue 8 item 1 (a
// 12-byte header claiming 808464432 x 48 bytes, plain and gzipped), item 2
// (dimensions (0, 2^32-1, 2^32-1) and friends), labels far above
// MaxClasses (item 3 through IDX), and good files of every type.
func idxSeeds() [][]byte {
	const m = 1<<32 - 1
	claim := idxFile(IDXUint8, []uint32{808464432, 48}, nil)
	seeds := [][]byte{
		claim,
		gzipBytes(claim),
		idxFile(IDXUint8, []uint32{808464432, 48}, bytes.Repeat([]byte{1}, 100)),
		idxFile(IDXUint8, []uint32{0, m, m}, nil),
		gzipBytes(idxFile(IDXUint8, []uint32{0, m, m}, nil)),
		idxFile(IDXFloat64, []uint32{m, 0, m}, nil),
		idxFile(IDXUint8, []uint32{2, 0, m, m, m}, nil),
		idxFile(IDXUint8, []uint32{1 << 31, 1 << 31}, nil),
		idxFile(IDXInt32, []uint32{2}, []byte{0, 0, 0, 3, 0x7F, 0xFF, 0xFF, 0xFF}),
		idxFile(IDXInt16, []uint32{2}, []byte{0, 1, 0xFF, 0xFF}),
		idxFile(IDXUint8, []uint32{2, 2, 3}, []byte{0, 51, 102, 153, 204, 255, 255, 0, 0, 0, 0, 128}),
		idxFile(IDXFloat32, []uint32{2, 2}, []byte{0, 0, 0, 0, 0, 0, 0, 0, 0x7F, 0xC0, 0, 0, 0, 0, 0, 0}),
		gzipBytes(idxFile(IDXUint8, []uint32{3, 1, 2}, []byte{0, 255, 10, 20, 30, 40})),
		{0x1f, 0x8b, 1, 2, 3},
		{0, 0, 0x08, 0},
		nil,
	}
	for _, c := range idxCases {
		seeds = append(seeds, idxFile(c.typ, c.dims, c.data))
	}
	return seeds
}

// FuzzReadIDX reads arbitrary bytes with ReadIDX and ReadIDXImages (with a
// record limit and scale taken from the fuzzer).
func FuzzReadIDX(f *testing.F) {
	for i, s := range idxSeeds() {
		f.Add(s, uint16(i%3), i%2 == 0)
	}
	f.Fuzz(func(t *testing.T, in []byte, limit uint16, scale bool) {
		n := decompressedLen(in)
		bound := uint64(idxAllocPerByte*n + idxFixedBytes)

		var d *IDX
		var err error
		got := heapAllocated(func() { d, err = ReadIDX(bytes.NewReader(in), "f.idx") })
		if got > bound {
			t.Fatalf("ReadIDX of %d bytes (%d decompressed) allocated %d bytes, bound %d", len(in), n, got, bound)
		}
		if err != nil {
			checkErr(t, err, "f.idx", "offset", "gzip")
		} else {
			count := 1
			for _, v := range d.Dims {
				count *= v
			}
			if len(d.Data) != count || len(d.Data) > n {
				t.Fatalf("dims %v hold %d elements, read %d from %d bytes", d.Dims, count, len(d.Data), n)
			}
		}

		opt := IDXOptions{Limit: int(limit)}
		if scale {
			opt.Scale = 1.0 / 255
		}
		var s *Set
		got = heapAllocated(func() { s, err = ReadIDXImages(bytes.NewReader(in), "f.idx", opt) })
		if got > bound {
			t.Fatalf("ReadIDXImages of %d bytes (%d decompressed) allocated %d bytes, bound %d", len(in), n, got, bound)
		}
		if err != nil {
			checkErr(t, err, "f.idx", "offset", "gzip")
			return
		}
		checkSet(t, s, n)
	})
}

// FuzzReadIDXLabels reads arbitrary bytes with ReadIDXLabels, with a class
// count taken from the fuzzer.
func FuzzReadIDXLabels(f *testing.F) {
	for i, s := range idxSeeds() {
		f.Add(s, uint32(i%3)*5)
	}
	f.Add(idxFile(IDXUint8, []uint32{3}, []byte{1, 0, 2}), uint32(MaxClasses+1))
	f.Fuzz(func(t *testing.T, in []byte, classes uint32) {
		n := decompressedLen(in)
		bound := uint64((idxAllocPerByte+8)*n + idxFixedBytes) // labels add one int per element, at most 8 bytes per byte
		var labels []int
		var err error
		opt := IDXOptions{Classes: int(classes)}
		got := heapAllocated(func() { labels, err = ReadIDXLabels(bytes.NewReader(in), "l.idx", opt) })
		if got > bound {
			t.Fatalf("ReadIDXLabels of %d bytes (%d decompressed) allocated %d bytes, bound %d", len(in), n, got, bound)
		}
		if err != nil {
			if opt.Classes > MaxClasses {
				checkErr(t, err, "opt.Classes")
			} else {
				checkErr(t, err, "l.idx", "offset", "gzip")
			}
			return
		}
		if len(labels) > n {
			t.Fatalf("%d labels from %d bytes", len(labels), n)
		}
		hi := MaxClasses
		if opt.Classes > 0 {
			hi = opt.Classes
		}
		for i, l := range labels {
			if l < 0 || l >= hi {
				t.Fatalf("label %d = %d outside [0, %d)", i, l, hi)
			}
		}
	})
}

// FuzzReadCSV reads arbitrary text with ReadCSV; the fuzzer also picks the
// separator, the label column (by name, "" for none) and the class count.
func FuzzReadCSV(f *testing.F) {
	seeds := []struct {
		in, label string
		classes   int
	}{
		{"x,y\n1,0\n2,9223372036854775807\n", "y", 0}, // issue 8 item 3
		{"x,y\n1,0\n2,65536\n", "y", 0},
		{"x,y\n1,0\n2,65535\n", "y", 0},
		{"x,y\n1,0\n2,4294967296\n", "y", 0},
		{"x,y\n1,0\n", "y", MaxClasses + 1},
		{"id, a ,b,label,c\nx1,1.5,-2,1, 3e2\n\nx2,0,0.25,0,4\n\"x\n3\",7,8,2,9\n", "label", 0},
		{"a,b,label\n1,2,0\n3,NaN,1\n", "label", 0},
		{"a,b,label\n1,2,0\n1e999,4,1\n", "", 0},
		{"a,b,label\n1,2,0\n3,4\"x,1\n", "", 0},
		{"a,b,label\n1,2,0\n3,4,-1\n", "label", 3},
		{"a,b,a\n1,2,3\n", "", 0},
		{"p;q\n1;2\n", "", 0},
		{"", "", 0},
	}
	for i, s := range seeds {
		f.Add([]byte(s.in), s.label, s.classes, uint8(i%3))
	}
	f.Fuzz(func(t *testing.T, in []byte, label string, classes int, sep uint8) {
		opt := CSVOptions{Label: label, Classes: classes, Comma: []rune{',', ';', '\t'}[sep%3]}
		// Error messages quote the option text (a label column that is not
		// in the header, say), so the caller's option bytes count as input.
		bound := uint64(csvBytesPerByte*(len(in)+len(label)) + csvFixedBytes)
		var s *Set
		var names []string
		var err error
		got := heapAllocated(func() { s, names, err = ReadCSV(bytes.NewReader(in), "f.csv", opt) })
		if got > bound {
			t.Fatalf("ReadCSV of %d bytes allocated %d bytes, bound %d", len(in), got, bound)
		}
		if err != nil {
			if errors.Is(err, ErrInvalidArgument) {
				checkErr(t, err, "opt")
			} else {
				checkErr(t, err, "f.csv")
			}
			return
		}
		if len(names) != s.Features() {
			t.Fatalf("%d names for %d features", len(names), s.Features())
		}
		checkSet(t, s, len(in))
		if label != "" && !s.HasLabels() {
			t.Fatalf("label column %q given, Set has no labels", label)
		}
	})
}

// checkErr fails unless err wraps one of the package's sentinels and
// mentions one of the given words (the file name, the argument, ...).
func checkErr(t *testing.T, err error, words ...string) {
	t.Helper()
	if !errors.Is(err, ErrInvalidData) && !errors.Is(err, ErrInvalidArgument) {
		t.Fatalf("error %q wraps neither ErrInvalidData nor ErrInvalidArgument", err)
	}
	for _, w := range words {
		if strings.Contains(err.Error(), w) {
			return
		}
	}
	t.Fatalf("error %q mentions none of %q", err, words)
}

// checkSet checks that a Set read from an input of n (decompressed) bytes
// is consistent: sizes agree, it holds no more values than the input had
// bytes, its labels lie below Classes() <= MaxClasses, and Fill and
// FillOneHot work on every record.
func checkSet(t *testing.T, s *Set, n int) {
	t.Helper()
	f := s.Features()
	if s.Len() < 0 || f < 1 {
		t.Fatalf("Set of %d records of %d features", s.Len(), f)
	}
	if s.Len() > n || s.Len()*f > n {
		t.Fatalf("%d records of %d features from %d bytes", s.Len(), f, n)
	}
	if v := s.Values(); len(v) != s.Len()*f {
		t.Fatalf("%d values for %d x %d", len(v), s.Len(), f)
	}
	p := 1
	for _, d := range s.Shape() {
		p *= d
	}
	if p != f {
		t.Fatalf("shape %v holds %d values, %d features", s.Shape(), p, f)
	}
	idx := make([]int, s.Len())
	for i := range idx {
		idx[i] = i
	}
	if err := s.Fill(make([]float32, s.Len()*f), idx); err != nil {
		t.Fatal(err)
	}
	if !s.HasLabels() {
		return
	}
	c := s.Classes()
	if c < 1 || c > MaxClasses {
		t.Fatalf("Classes() = %d, want 1..%d", c, MaxClasses)
	}
	for i := range s.Len() {
		if l := s.Label(i); l < 0 || l >= c {
			t.Fatalf("record %d: label %d, Classes() %d", i, l, c)
		}
	}
	if s.Len() > 0 {
		if err := s.FillOneHot(make([]float64, c), idx[:1]); err != nil {
			t.Fatal(err)
		}
	}
}

// The seeds of every target pass (this runs in every go test, without
// -fuzz, as the fuzz targets' seed corpus does too); here the bad inputs
// of items 1-3 are also checked to be rejected, not merely survived.
func TestFuzzSeedsRejected(t *testing.T) {
	for i, s := range idxSeeds()[:8] {
		if _, err := ReadIDXImages(bytes.NewReader(s), "seed", IDXOptions{}); err == nil {
			t.Errorf("IDX seed %d: read, want an error", i)
		}
	}
	for _, l := range []string{"9223372036854775807", fmt.Sprint(MaxClasses), "4294967296"} {
		if _, _, err := ReadCSV(strings.NewReader("x,y\n1,0\n2,"+l+"\n"), "seed", CSVOptions{Label: "y"}); err == nil {
			t.Errorf("CSV label %s: read, want an error", l)
		}
	}
}
