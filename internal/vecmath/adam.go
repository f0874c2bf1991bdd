package vecmath

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
		m[j], v[j] = mj, vj
		wj := w[j]
		prev[j] = wj
		wj -= c.LR * (mj * c.IC1) / (sqrt32(vj*c.IC2) + c.Eps)
		w[j] = wj
		check += wj - wj
	}
	return check
}
