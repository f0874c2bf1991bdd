package losses

import (
	"math"

	G "gorgonia.org/gorgonia"
	"gorgonia.org/tensor"
)

// ELBO returns the beta-weighted evidence lower bound per record,
//
//	logLik - beta * kl
//
// logLik and kl are vectors of shape (N) (for example PerSample of the
// per-dimension terms), or both scalars; beta is a scalar node. Keeping beta a
// node lets a schedule change it between steps (G.Let) without rebuilding
// the graph. beta = 1 gives the plain ELBO (Kingma and Welling 2014).
// Maximise the result; its negative batch mean is the usual training loss.
func ELBO(logLik, kl, beta *G.Node) (*G.Node, error) {
	const where = "losses.ELBO"
	if logLik == nil {
		return nil, argError(where, "logLik", "nil node")
	}
	if kl == nil {
		return nil, argError(where, "kl", "nil node")
	}
	if beta == nil {
		return nil, argError(where, "beta", "nil node")
	}
	if err := checkFloat(where, "logLik", logLik); err != nil {
		return nil, err
	}
	ls := logLik.Shape()
	if !logLik.IsScalar() && (ls.Dims() != 1 || ls[0] < 1) {
		return nil, argError(where, "logLik", "want a vector of shape (N) or a scalar, have shape %v", ls)
	}
	if !kl.Shape().Eq(ls) || kl.IsScalar() != logLik.IsScalar() {
		return nil, argError(where, "kl", "shape %v differs from logLik's %v", kl.Shape(), ls)
	}
	if kl.Dtype() != logLik.Dtype() {
		return nil, argError(where, "kl", "dtype %v differs from logLik's %v", kl.Dtype(), logLik.Dtype())
	}
	if !beta.IsScalar() {
		return nil, argError(where, "beta", "want a scalar node, have shape %v", beta.Shape())
	}
	if beta.Dtype() != logLik.Dtype() {
		return nil, argError(where, "beta", "dtype %v differs from logLik's %v", beta.Dtype(), logLik.Dtype())
	}
	bkl, err := G.Mul(kl, beta)
	if err != nil {
		return nil, opError(where, "beta*kl", err)
	}
	out, err := G.Sub(logLik, bkl)
	if err != nil {
		return nil, opError(where, "difference", err)
	}
	return out, nil
}

// LogSumExp returns log(sum(exp(a))) along axis 0 or 1 of a matrix a, in
// the stable form
//
//	m + log(sum(exp(a - m)))
//
// with m the maximum along the axis. The result is a vector: one value per
// column for axis 0, per row for axis 1. No gradient flows through m (it is
// held constant, common practice); the gradient is still exact, the
// softmax weights exp(a - lse). A slice of all -Inf gives -Inf.
//
// gorgonia's own LogSumExp (v0.9.18) adds the maximum inside the log and
// sums again, so it is not used.
func LogSumExp(a *G.Node, axis int) (*G.Node, error) {
	const where = "losses.LogSumExp"
	if err := checkMatrix(where, "a", a); err != nil {
		return nil, err
	}
	if axis != 0 && axis != 1 {
		return nil, argError(where, "axis", "want 0 or 1, have %d", axis)
	}
	m, err := G.ApplyOp(maxNoGrad{axis: axis}, a)
	if err != nil {
		return nil, opError(where, "max", err)
	}
	// a - m is formed as (-m) + a so that the left operand, the one
	// gorgonia may overwrite in place, is the fresh broadcast of -m and
	// never a's memory (a may be a reshaped view of a node used elsewhere).
	negM, err := G.Neg(m)
	if err != nil {
		return nil, opError(where, "-max", err)
	}
	var shifted *G.Node
	if a.Shape()[axis] == 1 {
		shifted, err = G.Add(negM, a)
	} else {
		shifted, err = G.BroadcastAdd(negM, a, []byte{byte(axis)}, nil)
	}
	if err != nil {
		return nil, opError(where, "a - max", err)
	}
	e, err := G.Exp(shifted)
	if err != nil {
		return nil, opError(where, "exp", err)
	}
	s, err := G.Sum(e, axis)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	ls, err := G.Log(s)
	if err != nil {
		return nil, opError(where, "log", err)
	}
	mv, err := G.Reshape(m, tensor.Shape{a.Shape()[1-axis]})
	if err != nil {
		return nil, opError(where, "max", err)
	}
	out, err := G.Add(mv, ls)
	if err != nil {
		return nil, opError(where, "sum", err)
	}
	return out, nil
}

// ImportanceWeighted returns the importance-weighted bound per record
// (Burda, Grosse and Salakhutdinov 2016):
//
//	L_K = log( (1/K) * sum_k w_k ),   log w_k = log p(x, z_k) - log q(z_k | x)
//
// computed as LogSumExp over the K samples minus log K. logW has shape
// (K, N): row k holds sample k of every record. layers.Reparameterize puts
// sample k of record n at row k*N + n, so a per-sample vector of K*N log
// weights reshaped to (K, N) is in this order. The result has shape (N).
// K = 1 gives the ELBO; L_K never decreases in expectation as K grows and
// tends to log p(x) (Burda et al. 2016, Theorem 1).
func ImportanceWeighted(logW *G.Node) (*G.Node, error) {
	const where = "losses.ImportanceWeighted"
	if err := checkMatrix(where, "logW", logW); err != nil {
		return nil, err
	}
	k := logW.Shape()[0]
	lse, err := LogSumExp(logW, 0)
	if err != nil {
		return nil, opError(where, "log-sum-exp", err)
	}
	if k == 1 {
		return lse, nil
	}
	out, err := G.Sub(lse, scalar(logW, math.Log(float64(k))))
	if err != nil {
		return nil, opError(where, "log K", err)
	}
	return out, nil
}
