//go:build !amd64

package vecmath

// Off amd64 the portable Go kernels run.
const useAsm = false

func bernoulliRowSumAVX2(x, l []float32) float64 { return bernoulliRowSumGo(x, l) }

func bernoulliGradRowAVX2(out, x, l []float32, g float32) { bernoulliGradRowGo(out, x, l, g) }

func adamAVX2(w, g, m, v, prev []float32, c *AdamCoeffs) float32 { return adamGo(w, g, m, v, prev, c) }

func tanhAVX2(y []float32) {
	for i, v := range y {
		y[i] = tanhFast32(v)
	}
}
