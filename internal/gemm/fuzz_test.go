package gemm

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
)

// FuzzGemm compares every kernel with gonum on fuzzed shapes, transposes,
// padding, scalars and thread counts (tolerance as in problem.check).
func FuzzGemm(f *testing.F) {
	f.Add(uint8(1), uint8(1), uint8(1), false, false, uint8(0), float32(1), float32(0), uint8(1), uint64(1))
	f.Add(uint8(13), uint8(33), uint8(7), true, false, uint8(2), float32(-0.5), float32(1), uint8(2), uint64(2))
	f.Add(uint8(25), uint8(17), uint8(200), false, true, uint8(1), float32(2), float32(0.25), uint8(3), uint64(3))
	f.Add(uint8(100), uint8(200), uint8(100), true, true, uint8(0), float32(1), float32(1), uint8(2), uint64(4))
	k32, k64 := kernelsForTest()
	f.Fuzz(func(t *testing.T, m, n, k uint8, tA, tB bool, pad uint8, alpha, beta float32, threads uint8, seed uint64) {
		if math.IsNaN(float64(alpha)) || math.IsInf(float64(alpha), 0) || math.IsNaN(float64(beta)) || math.IsInf(float64(beta), 0) ||
			math.Abs(float64(alpha)) > 1e6 || math.Abs(float64(beta)) > 1e6 {
			return // keeps the products finite; NaN and Inf have their own test
		}
		rng := rand.New(rand.NewPCG(seed, 13))
		th := int(threads%4) + 1
		p := newProblem(rng, tA, tB, int(m), int(n), int(k), int(pad%5), alpha, beta)
		want := p.want()
		for _, kn := range k32 {
			p.check(t, fmt.Sprintf("%s float32", kn.name), p.got(kn, th), want)
		}
		q := newProblem(rng, tA, tB, int(m), int(n), int(k), int(pad%5), float64(alpha), float64(beta))
		want64 := q.want()
		for _, kn := range k64 {
			q.check(t, fmt.Sprintf("%s float64", kn.name), q.got(kn, th), want64)
		}
	})
}
