//go:build amd64

package vecmath

import "golang.org/x/sys/cpu"

// useAsm selects the AVX2+FMA kernels of kernels_amd64.s; it is set once,
// when the package loads, from the CPU's features.
var useAsm = cpu.X86.HasAVX2 && cpu.X86.HasFMA

// bernoulliRowSumAVX2 is bernoulliRowSumGo for len(l) a multiple of 8 and
// len(x) >= len(l).
//
//go:noescape
func bernoulliRowSumAVX2(x, l []float32) float64

// bernoulliGradRowAVX2 is bernoulliGradRowGo for len(l) a multiple of 8
// and len(out), len(x) >= len(l).
//
//go:noescape
func bernoulliGradRowAVX2(out, x, l []float32, scale float32)

// adamAVX2 is adamGo for len(w) a multiple of 8 and the other slices at
// least as long.
//
//go:noescape
func adamAVX2(w, g, m, v, prev []float32, c *AdamCoeffs) float32

// tanhAVX2 is tanhFast32 over y, len(y) a multiple of 8.
//
//go:noescape
func tanhAVX2(y []float32)
