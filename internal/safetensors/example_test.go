package safetensors_test

import (
	"bytes"
	"fmt"

	"lowerbound.dev/internal/safetensors"
)

func Example() {
	w, err := safetensors.FromFloat32("encoder/w", []int{2, 2}, []float32{1, 2, 3, 4})
	if err != nil {
		panic(err)
	}
	var buf bytes.Buffer
	if err := safetensors.Write(&buf, []safetensors.Tensor{w}, map[string]string{"epoch": "3"}); err != nil {
		panic(err)
	}

	f, err := safetensors.ReadBytes(buf.Bytes())
	if err != nil {
		panic(err)
	}
	t, err := f.Tensor("encoder/w")
	if err != nil {
		panic(err)
	}
	v, err := t.Float32s()
	if err != nil {
		panic(err)
	}
	fmt.Println(t.Dtype, t.Shape, v, f.Metadata["epoch"])
	// Output:
	// F32 [2 2] [1 2 3 4] 3
}
