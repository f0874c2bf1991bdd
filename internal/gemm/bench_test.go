package gemm

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// benchShapes are the float32 products (M×K×N, C = A·B) of the benchmark
// models at batch 100, as ../shared/bench/torch-gemm lists them.
var benchShapes = [][3]int{{100, 784, 200}, {100, 200, 200}, {100, 200, 100}, {100, 784, 400}, {100, 400, 784}, {784, 100, 200}, {200, 100, 784}}

// BenchmarkSgemm reports GFLOP/s (2·M·N·K per product) for every kernel
// this CPU runs, on one and two goroutines.
func BenchmarkSgemm(b *testing.B) {
	k32, _ := kernelsForTest()
	for _, kn := range k32 {
		for _, sh := range benchShapes {
			for _, threads := range []int{1, 2} {
				m, k, n := sh[0], sh[1], sh[2]
				b.Run(fmt.Sprintf("%s/%dx%dx%d/threads=%d", kn.name, m, k, n, threads), func(b *testing.B) {
					rng := rand.New(rand.NewPCG(1, 1))
					x, y, c := randSlice[float32](rng, m*k), randSlice[float32](rng, k*n), make([]float32, m*n)
					for b.Loop() {
						gemm(kn, threads, false, false, m, n, k, 1, x, k, y, n, 0, c, n)
					}
					b.ReportMetric(2*float64(m*n*k)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
				})
			}
		}
	}
}

// BenchmarkDgemm is BenchmarkSgemm for float64 on one goroutine.
func BenchmarkDgemm(b *testing.B) {
	_, k64 := kernelsForTest()
	for _, kn := range k64 {
		for _, sh := range benchShapes {
			m, k, n := sh[0], sh[1], sh[2]
			b.Run(fmt.Sprintf("%s/%dx%dx%d", kn.name, m, k, n), func(b *testing.B) {
				rng := rand.New(rand.NewPCG(1, 1))
				x, y, c := randSlice[float64](rng, m*k), randSlice[float64](rng, k*n), make([]float64, m*n)
				for b.Loop() {
					gemm(kn, 1, false, false, m, n, k, 1, x, k, y, n, 0, c, n)
				}
				b.ReportMetric(2*float64(m*n*k)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
			})
		}
	}
}
