package safetensors

import (
	"bytes"
	"errors"
	"io"
	"runtime"
	"slices"
	"testing"
	"testing/iotest"
)

// ReadStream gives the same file as ReadBytes for every valid input, and
// the same verdict (error or not) for every prefix of one.
func TestReadStreamMatchesReadBytes(t *testing.T) {
	full := valid(t)
	want, err := ReadBytes(full)
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range []io.Reader{bytes.NewReader(full), iotest.OneByteReader(bytes.NewReader(full)), iotest.HalfReader(bytes.NewReader(full))} {
		got, err := ReadStream(r, 1<<20)
		if err != nil {
			t.Fatalf("ReadStream: %v", err)
		}
		if !slices.Equal(got.Names(), want.Names()) || got.Metadata["k"] != "v" {
			t.Fatalf("ReadStream: %v, want %v", got.Names(), want.Names())
		}
		for n, tw := range want.Tensors {
			if tg := got.Tensors[n]; !bytes.Equal(tg.Data, tw.Data) || !slices.Equal(tg.Shape, tw.Shape) || tg.Dtype != tw.Dtype {
				t.Errorf("tensor %q differs", n)
			}
		}
	}
	for n := 0; n < len(full); n++ {
		_, err := ReadStream(bytes.NewReader(full[:n]), 1<<20)
		if !errors.Is(err, ErrTruncated) {
			t.Fatalf("prefix of %d bytes: err %v, want ErrTruncated", n, err)
		}
	}
	if _, err := ReadStream(bytes.NewReader(append(slices.Clone(full), 0)), 1<<20); !errors.Is(err, ErrCorrupt) {
		t.Errorf("trailing byte: err %v, want ErrCorrupt", err)
	}
	if _, err := ReadStream(iotest.ErrReader(errInjected), 1<<20); !errors.Is(err, errInjected) {
		t.Errorf("reader error: %v, want it wrapped", err)
	}
	if _, err := ReadStream(bytes.NewReader(full), 4); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("maxSize 4: %v, want ErrInvalidArgument", err)
	}
}

// The limit is applied to what the header declares, before the data are
// read; an exact fit passes.
func TestReadStreamLimit(t *testing.T) {
	full := valid(t)
	if _, err := ReadStream(bytes.NewReader(full), int64(len(full))); err != nil {
		t.Fatalf("limit = file size: %v", err)
	}
	_, err := ReadStream(bytes.NewReader(full), int64(len(full)-1))
	if !errors.Is(err, ErrTooLarge) || !errors.Is(err, ErrCorrupt) {
		t.Fatalf("limit one byte short: %v, want ErrTooLarge", err)
	}
	_, err = ReadStream(bytes.NewReader(full), 20)
	if !errors.Is(err, ErrTooLarge) {
		t.Fatalf("limit below the header: %v, want ErrTooLarge", err)
	}
}

// A short stream whose header claims a huge header or a huge tensor costs
// about its own size, not the claim: the bytes allocated by ReadStream stay
// under 1 MiB although the claims are 100 MB and 8 GB.
func TestReadStreamAllocatesWhatArrives(t *testing.T) {
	hugeHeader := make([]byte, 8, 64)
	hugeHeader[0], hugeHeader[1], hugeHeader[2], hugeHeader[3] = 0x00, 0xe1, 0xf5, 0x05 // 100,000,000
	hugeHeader = append(hugeHeader, `{"a":`...)
	hugeData := assemble(`{"a":{"dtype":"F64","shape":[1000000000],"data_offsets":[0,8000000000]}}`, le64(1, 2, 3))
	for name, in := range map[string][]byte{"header of 100 MB": hugeHeader, "tensor of 8 GB": hugeData} {
		var before, after runtime.MemStats
		runtime.ReadMemStats(&before)
		_, err := ReadStream(bytes.NewReader(in), 16<<30)
		runtime.ReadMemStats(&after)
		if !errors.Is(err, ErrTruncated) {
			t.Errorf("%s: err %v, want ErrTruncated", name, err)
		}
		if got := after.TotalAlloc - before.TotalAlloc; got > 1<<20 {
			t.Errorf("%s: ReadStream allocated %d bytes for a %d-byte stream", name, got, len(in))
		}
	}
}
