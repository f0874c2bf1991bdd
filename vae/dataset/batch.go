package dataset

import "math/rand/v2"

// Batches splits the record indices 0..n-1 into minibatches of size records
// for one epoch. With a non-nil rng the indices are shuffled first
// (Fisher–Yates driven by rng.IntN); with a nil rng they stay in order.
// Every index appears in exactly one batch. When size does not divide n the
// last batch is smaller (ragged); no index is dropped. n = 0 gives no
// batches.
//
// The order depends only on the state of rng: two generators built from the
// same seed, e.g. rand.New(rand.NewPCG(seed, 0)), give the same batches
// (with the same Go release), and a generator that is reused keeps
// advancing, so successive epochs get fresh orders.
//
// All batches are sub-slices of one freshly allocated permutation; callers
// may keep or modify them.
func Batches(n, size int, rng *rand.Rand) ([][]int, error) {
	const where = "dataset.Batches"
	if n < 0 {
		return nil, argError(where, "n", "negative record count %d", n)
	}
	if size < 1 {
		return nil, argError(where, "size", "batch size %d, want at least 1", size)
	}
	var perm []int
	if rng == nil {
		perm = make([]int, n)
		for i := range perm {
			perm[i] = i
		}
	} else {
		perm = permute(rng, n)
	}
	out := make([][]int, 0, (n+size-1)/size)
	for lo := 0; lo < n; lo += size {
		hi := min(lo+size, n)
		out = append(out, perm[lo:hi:hi])
	}
	return out, nil
}

// permute returns a uniformly random permutation of 0..n-1 drawn from rng.
// It is written out (rather than rng.Perm) so the order is fixed by this
// code and rng.IntN alone.
func permute(rng *rand.Rand, n int) []int {
	p := make([]int, n)
	for i := range p {
		p[i] = i
	}
	for i := n - 1; i > 0; i-- {
		j := rng.IntN(i + 1)
		p[i], p[j] = p[j], p[i]
	}
	return p
}
