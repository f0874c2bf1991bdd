package dataset

import (
	"bytes"
	"fmt"
	"runtime"
	"strings"
	"testing"
)

// heapAllocated returns the bytes allocated on the heap while f runs (the
// growth of runtime.MemStats.TotalAlloc). It counts every goroutine, so the
// tests that use it do not run in parallel; the bounds they check are wide
// enough for the runtime's own background allocations.
func heapAllocated(f func()) uint64 {
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)
	f()
	runtime.ReadMemStats(&after)
	return after.TotalAlloc - before.TotalAlloc
}

// idxAllocBound is the documented bound of ReadIDX (see the IDX section of
// doc.go) for a stream holding n bytes of element data: idxAllocPerByte
// bytes per byte, plus idxFixedBytes of fixed buffers.
func idxAllocBound(n int) uint64 {
	return uint64(idxAllocPerByte*n + idxFixedBytes)
}

// A 12-byte header claiming 808464432 x 48 one-byte elements (38.8 G) with
// no data after it must cost a small fixed amount, not the 1 GiB the reader
// once allocated up front. The same through gzip.
func TestReadIDXHugeClaimSmallFile(t *testing.T) {
	in := idxFile(IDXUint8, []uint32{808464432, 48}, nil) // "0000" as the first dimension
	if len(in) != 12 {
		t.Fatalf("header is %d bytes, want 12", len(in))
	}
	for _, zipped := range []bool{false, true} {
		b := in
		if zipped {
			b = gz(t, in)
		}
		var err error
		got := heapAllocated(func() { _, err = ReadIDX(bytes.NewReader(b), "claim.idx") })
		mustErr(t, err, ErrInvalidData, "claim.idx", "offset 12", "after 0 of")
		if bound := idxAllocBound(0); got > bound {
			t.Errorf("gzip %v: a 12-byte file with no elements allocated %d bytes, bound %d", zipped, got, bound)
		}
		got = heapAllocated(func() { _, err = ReadIDXImages(bytes.NewReader(b), "claim.idx", IDXOptions{}) })
		mustErr(t, err, ErrInvalidData, "claim.idx", "offset 12")
		if bound := idxAllocBound(0); got > bound {
			t.Errorf("ReadIDXImages, gzip %v: allocated %d bytes, bound %d", zipped, got, bound)
		}
	}
	// The same claim followed by 100000 real one-byte elements: the cost
	// follows the bytes that arrive.
	const n = 100000
	in = idxFile(IDXUint8, []uint32{808464432, 48}, bytes.Repeat([]byte{7}, n))
	var err error
	got := heapAllocated(func() { _, err = ReadIDX(bytes.NewReader(in), "claim.idx") })
	mustErr(t, err, ErrInvalidData, fmt.Sprintf("offset %d", 12+n), fmt.Sprintf("after %d of", n))
	if bound := idxAllocBound(n); got > bound {
		t.Errorf("%d elements: allocated %d bytes, bound %d", n, got, bound)
	}
}

// A file that is what it claims still reads within the bound.
func TestReadIDXAllocBoundGoodFile(t *testing.T) {
	for _, n := range []int{1, 1000, 300000} {
		data := make([]byte, n)
		for i := range data {
			data[i] = byte(i)
		}
		in := idxFile(IDXUint8, []uint32{uint32(n)}, data)
		var d *IDX
		var err error
		got := heapAllocated(func() { d, err = ReadIDX(bytes.NewReader(in), "ok.idx") })
		if err != nil {
			t.Fatal(err)
		}
		if len(d.Data) != n || d.Data[n-1] != float64(byte(n-1)) {
			t.Fatalf("n %d: read %d elements", n, len(d.Data))
		}
		if bound := idxAllocBound(n); got > bound {
			t.Errorf("n %d: allocated %d bytes, bound %d", n, got, bound)
		}
	}
}

// Dimensions (0, 2^32-1, 2^32-1): zero records, but each record would hold
// (2^32-1)^2 values, which overflows int64; the reader once returned a Set
// with a negative Features(). Every dimension product is checked now, and
// the error names the byte offset of the dimension that overflows
// (dimension i is at byte 4 + 4i).
func TestReadIDXDimensionOverflow(t *testing.T) {
	const m = 1<<32 - 1
	cases := []struct {
		dims []uint32
		off  string
	}{
		{[]uint32{0, m, m}, "offset 12"},
		{[]uint32{m, 0, m}, "offset 12"},
		{[]uint32{m, m, 0}, "offset 8"},
		{[]uint32{1, 1 << 20, 1 << 20, 0}, "offset 12"}, // 2^40 values per record: at the limit
		{[]uint32{0, 0, 1 << 21, 1 << 20}, "offset 16"},
		{[]uint32{2, 0, m, m, m}, "offset 16"},
	}
	for _, c := range cases {
		in := idxFile(IDXUint8, c.dims, nil)
		for _, zipped := range []bool{false, true} {
			b := in
			if zipped {
				b = gz(t, in)
			}
			if c.dims[len(c.dims)-1] == 0 && c.dims[1] == 1<<20 {
				// The product of the non-zero dimensions is exactly 2^40: it is
				// accepted, and the file (zero elements) reads as empty.
				d, err := ReadIDX(bytes.NewReader(b), "z.idx")
				if err != nil || len(d.Data) != 0 {
					t.Fatalf("%v: %v, %v", c.dims, d, err)
				}
				_, err = ReadIDXImages(bytes.NewReader(b), "z.idx", IDXOptions{})
				mustErr(t, err, ErrInvalidData, "z.idx", "hold no values")
				continue
			}
			_, err := ReadIDX(bytes.NewReader(b), "ovf.idx")
			mustErr(t, err, ErrInvalidData, "ovf.idx", c.off, "dimension")
			s, err := ReadIDXImages(bytes.NewReader(b), "ovf.idx", IDXOptions{})
			if err == nil {
				t.Fatalf("%v (gzip %v): Set with %d records of %d features, want an error", c.dims, zipped, s.Len(), s.Features())
			}
			mustErr(t, err, ErrInvalidData, "ovf.idx", c.off)
			_, err = ReadIDXLabels(bytes.NewReader(b), "ovf.idx", IDXOptions{})
			mustErr(t, err, ErrInvalidData, "ovf.idx", c.off)
		}
	}
}

// A CSV label of 9223372036854775807 (math.MaxInt64) once made Classes()
// overflow to a negative count, and FillOneHot then panicked. Labels are
// bounded by MaxClasses now, with an error naming line and column.
func TestReadCSVHugeLabel(t *testing.T) {
	cases := []struct{ label, part string }{
		{"9223372036854775807", "label 9223372036854775807"},
		{fmt.Sprint(MaxClasses), fmt.Sprintf("label %d", MaxClasses)},
		{"4294967296", "label 4294967296"},
	}
	for _, c := range cases {
		in := "x,y\n1,0\n2," + c.label + "\n"
		s, _, err := ReadCSV(strings.NewReader(in), "big.csv", CSVOptions{Label: "y"})
		if err == nil {
			// Show what the old code did with it.
			t.Errorf("label %s: Set with Classes() = %d, want an error", c.label, s.Classes())
			func() {
				defer func() {
					if r := recover(); r != nil {
						t.Errorf("label %s: FillOneHot panicked: %v", c.label, r)
					}
				}()
				_ = s.FillOneHot(make([]float64, 16), []int{1})
			}()
			continue
		}
		mustErr(t, err, ErrInvalidData, "big.csv", `line 3, column 2 ("y")`, c.part, "MaxClasses")
	}
	// The largest label allowed: the class count is exactly MaxClasses.
	s, _, err := ReadCSV(strings.NewReader(fmt.Sprintf("x,y\n1,%d\n", MaxClasses-1)), "ok.csv", CSVOptions{Label: "y"})
	if err != nil || s.Classes() != MaxClasses {
		t.Fatalf("label MaxClasses-1: %v, %v", s, err)
	}
	dst := make([]float32, MaxClasses)
	if err := s.FillOneHot(dst, []int{0}); err != nil || dst[MaxClasses-1] != 1 {
		t.Fatalf("FillOneHot at the limit: %v", err)
	}
	_, _, err = ReadCSV(strings.NewReader("x,y\n1,0\n"), "c.csv", CSVOptions{Label: "y", Classes: MaxClasses + 1})
	mustErr(t, err, ErrInvalidArgument, "opt.Classes", "MaxClasses")
}

func TestLabelsBoundedEverywhere(t *testing.T) {
	s, err := New([]float64{1, 2}, 2, 1)
	if err != nil {
		t.Fatal(err)
	}
	_, err = s.WithLabels([]int{0, 1<<63 - 1}, 0)
	mustErr(t, err, ErrInvalidData, "record 1", "label 9223372036854775807", "MaxClasses")
	_, err = s.WithLabels([]int{0, 1}, MaxClasses+1)
	mustErr(t, err, ErrInvalidArgument, "classes", "MaxClasses")
	if l, err := s.WithLabels([]int{0, MaxClasses - 1}, 0); err != nil || l.Classes() != MaxClasses {
		t.Fatalf("label MaxClasses-1: %v, %v", l, err)
	}

	// An int32 IDX label file: label 2^31-1 in record 1, at offset 8 + 4.
	lab := idxFile(IDXInt32, []uint32{2}, []byte{0, 0, 0, 3, 0x7F, 0xFF, 0xFF, 0xFF})
	_, err = ReadIDXLabels(bytes.NewReader(lab), "lab.idx", IDXOptions{})
	mustErr(t, err, ErrInvalidData, "lab.idx", "record 1 (offset 12)", "label 2147483647", "MaxClasses")
	_, err = ReadIDXLabels(bytes.NewReader(lab), "lab.idx", IDXOptions{Classes: MaxClasses + 1})
	mustErr(t, err, ErrInvalidArgument, "opt.Classes", "MaxClasses")
}
