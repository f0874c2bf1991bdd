package gemm

import (
	"math/rand/v2"
	"testing"
)

// BenchmarkMicro times each float32 microkernel alone on packed strips that
// stay in L1 (kc = 256): the ceiling the blocked driver can reach.
func BenchmarkMicro(b *testing.B) {
	k32, _ := kernelsForTest()
	for _, kn := range k32 {
		b.Run(kn.name, func(b *testing.B) {
			const kc = 256
			rng := rand.New(rand.NewPCG(1, 1))
			a, bb := randSlice[float32](rng, kc*kn.mr), randSlice[float32](rng, kc*kn.nr)
			c := make([]float32, kn.mr*kn.nr)
			for b.Loop() {
				kn.micro(kc, &a[0], &bb[0], &c[0], kn.nr, 1, 0)
			}
			b.ReportMetric(2*float64(kc*kn.mr*kn.nr)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
		})
	}
}
