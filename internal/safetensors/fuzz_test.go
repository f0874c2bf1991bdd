package safetensors

import (
	"bytes"
	"encoding/binary"
	"slices"
	"testing"
)

// FuzzRead checks that no input makes Read panic, and that whatever Read
// accepts survives a write and a second read unchanged. `go test` runs only
// the seeds; run `go test -fuzz FuzzRead ./internal/safetensors` to explore.
func FuzzRead(f *testing.F) {
	f.Add(valid(f))
	f.Add(assemble(`{}`, nil))
	f.Add(assemble(`{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"__metadata__":{"k":"v"}}  `, le32(1, 2)))
	f.Add(assemble(`{"a":{"dtype":"I64","shape":[],"data_offsets":[0,8]},"z":{"dtype":"BF16","shape":[0],"data_offsets":[8,8]}}`, make([]byte, 8)))
	f.Add(assemble(`{"a":{"dtype":"F32","shape":[1],"data_offsets":[4,8]}}`, le32(1, 2)))
	f.Add(assemble(`{"a":{"dtype":"F64","shape":[4611686018427387904,4],"data_offsets":[0,8]}}`, le64(1)))
	f.Add(binary.LittleEndian.AppendUint64(nil, 1<<63))
	f.Add([]byte{})
	f.Fuzz(func(t *testing.T, data []byte) {
		file, err := ReadBytes(data)
		if err != nil {
			return
		}
		var buf bytes.Buffer
		if err := Write(&buf, file.List(), file.Metadata); err != nil {
			// Names Write refuses (empty) may still be read; nothing else.
			if _, ok := file.Tensors[""]; ok {
				return
			}
			t.Fatalf("rewrite of an accepted file failed: %v", err)
		}
		again, err := ReadBytes(buf.Bytes())
		if err != nil {
			t.Fatalf("reread failed: %v", err)
		}
		if !slices.Equal(again.Names(), file.Names()) || len(again.Metadata) != len(file.Metadata) {
			t.Fatalf("reread differs")
		}
		for name, tensor := range file.Tensors {
			g := again.Tensors[name]
			if g.Dtype != tensor.Dtype || !slices.Equal(g.Shape, tensor.Shape) || !bytes.Equal(g.Data, tensor.Data) {
				t.Fatalf("tensor %q differs after rewrite", name)
			}
		}
		for k, v := range file.Metadata {
			if again.Metadata[k] != v {
				t.Fatalf("metadata %q differs after rewrite", k)
			}
		}
	})
}
