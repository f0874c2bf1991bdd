package vae

import (
	"strings"
	"testing"
)

// TestTrainingGraphHasNoDataGradient checks that the training program
// builds no gradient with respect to the data: the first encoder layer has
// no input-gradient product (a Gemm with transB whose output has the
// data's shape) and the Bernoulli likelihood no gradient with respect to
// its observations. Both would be computed at every step and never used.
func TestTrainingGraphHasNoDataGradient(t *testing.T) {
	m := smallMLP(t, 1)
	const batch = 4
	p, err := m.build(programKey{kind: kindTrain, batch: batch, k: 1})
	if err != nil {
		t.Fatal(err)
	}
	gemms := 0
	for _, nd := range p.g.AllNodes() {
		op := nd.Op()
		if op == nil {
			continue
		}
		s := op.String()
		if strings.HasPrefix(s, "Gemm(") {
			gemms++
		}
		if strings.Contains(s, "transB=true") && nd.Shape().Eq(p.x.Shape()) {
			t.Errorf("training graph computes the data gradient %v (shape %v)", nd, nd.Shape())
		}
		if s == "BernoulliLogProbRowsGradX" {
			t.Errorf("training graph computes the likelihood's gradient with respect to x: %v", nd)
		}
	}
	// 12-8-(3, 3) encoder, 3-8-12 decoder: 5 Dense layers, each with a
	// weight-gradient product, and 4 of them with an input-gradient
	// product (all but the first).
	if gemms != 9 {
		t.Errorf("training graph has %d gradient products, want 9", gemms)
	}
}
