//go:build !amd64

package gemm

// Off amd64 the portable kernels are the best there is.
var (
	best32 = &portable32
	best64 = &portable64
)

func kernelsForTest() ([]*kernel[float32], []*kernel[float64]) {
	return []*kernel[float32]{&portable32}, []*kernel[float64]{&portable64}
}
