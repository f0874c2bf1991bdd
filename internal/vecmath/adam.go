package vecmath

import "math"

// AdamCoeffs are the per-step scalars of an Adam update (Kingma and Ba
// 2015, Algorithm 1) in float32: the decay rates B1, B2, their complements
// OB1 = 1-beta1 and OB2 = 1-beta2, the learning rate LR, Eps, and the
// inverse bias corrections IC1 = 1/(1-beta1^t), IC2 = 1/(1-beta2^t).
type AdamCoeffs struct {
	B1, OB1, B2, OB2, LR, Eps, IC1, IC2 float32
}

// Adam32 updates w in place by one Adam step from the gradient g and the
// moments m and v (updated too), keeping w's previous values in prev:
//
//	m = B1*m + OB1*g
//	v = B2*v + (OB2*g)*g
//	w = w - (LR*(m*IC1)) / (sqrt(v*IC2) + Eps)
//
// A new m or v below the smallest normal float32 (2^-126) is stored as +0.
// A parameter whose gradient stays zero (a unit that no longer fires)
// would otherwise see its moments decay into subnormal numbers, on which
// x86 arithmetic runs tens of times slower; flushing them changes the
// step by less than 2^-126*LR*IC1/Eps, far below a float32 ulp of any
// weight. (Flushing subnormals to zero is common practice in float32
// training.)
//
// It reports whether every new value of w is finite. g, m, v and prev must
// be at least as long as w.
//
// Every operation is one IEEE float32 operation in the order written (no
// fused multiply-add; sqrt and division correctly rounded), in the AVX2
// assembly on amd64 and in Go elsewhere, so both give the same bits as the
// straightforward float32 Go loop.
func Adam32(w, g, m, v, prev []float32, c *AdamCoeffs) bool {
	n := len(w)
	g, m, v, prev = g[:n], m[:n], v[:n], prev[:n]
	var check float32
	k := 0
	if useAsm {
		k = n &^ 7
		if k > 0 {
			check = adamAVX2(w[:k], g[:k], m[:k], v[:k], prev[:k], c)
		}
	}
	check += adamGo(w[k:], g[k:], m[k:], v[k:], prev[k:], c)
	return check == 0
}

// adamGo is Adam32's loop; it returns 0 when every new value is finite and
// NaN otherwise (w - w is 0 for a finite w and NaN for ±Inf or NaN, and NaN
// sticks).
func adamGo(w, g, m, v, prev []float32, c *AdamCoeffs) float32 {
	n := len(w)
	g, m, v, prev = g[:n], m[:n], v[:n], prev[:n]
	var check float32
	for j := range w {
		gj := g[j]
		mj := c.B1*m[j] + c.OB1*gj
		vj := c.B2*v[j] + c.OB2*gj*gj
		mj, vj = FlushSubnormal32(mj), FlushSubnormal32(vj)
		m[j], v[j] = mj, vj
		wj := w[j]
		prev[j] = wj
		wj -= c.LR * (mj * c.IC1) / (sqrt32(vj*c.IC2) + c.Eps)
		w[j] = wj
		check += wj - wj
	}
	return check
}

// FlushSubnormal32 returns +0 for x = ±0 or a subnormal x, else x: the
// assembly's test of the exponent bits.
func FlushSubnormal32(x float32) float32 {
	if math.Float32bits(x)&0x7f800000 == 0 {
		return 0
	}
	return x
}

// FlushSubnormal64 is FlushSubnormal32 for float64 (below 2^-1022).
func FlushSubnormal64(x float64) float64 {
	if math.Float64bits(x)&0x7ff0000000000000 == 0 {
		return 0
	}
	return x
}
