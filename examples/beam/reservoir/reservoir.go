// Package reservoir draws uniform random samples of fixed size from
// streams of unknown length.
//
// AlgorithmR is Vitter's algorithm R (J. S. Vitter, "Random sampling with a
// reservoir", ACM TOMS 11(1), 1985): keep the first k items, then replace a
// uniformly chosen slot with item t (0-based) with probability k/(t+1).
// It needs to see the stream in one order on one machine.
//
// A distributed engine splits the input into shards, processes them on
// different workers and merges partial results in any order, so the
// sampler must be mergeable. BottomK is: every item gets a pseudo-random
// priority computed from the seed and the item's own stable key alone
// (Priority), and the sample is the k items of smallest priority. Since the
// priorities are (pseudo-)independent and uniform, every k-subset is
// equally likely to hold the k smallest, so the sample is a uniform sample
// without replacement exactly like algorithm R's (the "bottom-k" or
// priority sketch; Cohen and Kaplan 2007; the same idea as Efraimidis and
// Spirakis 2006 with equal weights). The k smallest of a union are the k
// smallest of the per-shard k smallest, so shards keep their own BottomK
// and Merge combines them in any order and grouping with the same result:
// the sample depends only on the seed and the set of keys, not on
// sharding, bundle sizes or order. Per-shard algorithm-R reservoirs could
// be merged too, but only by a further weighted random draw whose result
// depends on how the input was split.
package reservoir

import (
	"container/heap"
	"math/rand/v2"
	"sort"
)

// AlgorithmR is Vitter's algorithm R over a stream of T.
type AlgorithmR[T any] struct {
	k    int
	seen int64
	rng  *rand.Rand
	res  []T
}

// NewAlgorithmR returns a reservoir of size k >= 1 seeded with seed.
func NewAlgorithmR[T any](k int, seed uint64) *AlgorithmR[T] {
	return &AlgorithmR[T]{k: max(k, 1), rng: rand.New(rand.NewPCG(seed, 0x52))}
}

// Add offers the next item of the stream.
func (r *AlgorithmR[T]) Add(x T) {
	r.seen++
	if len(r.res) < r.k {
		r.res = append(r.res, x)
		return
	}
	if j := r.rng.Int64N(r.seen); j < int64(r.k) {
		r.res[j] = x
	}
}

// Sample returns the current sample (at most k items).
func (r *AlgorithmR[T]) Sample() []T { return append([]T(nil), r.res...) }

// Priority is the sampling priority of the item with key under seed: the
// first output of a PCG generator seeded with (seed, key) (math/rand/v2),
// passed through a SplitMix64 finaliser so that consecutive keys give
// unrelated priorities.
func Priority(seed, key uint64) uint64 {
	z := rand.New(rand.NewPCG(seed, key)).Uint64()
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// Item is one sampled item with its key and priority.
type Item[T any] struct {
	Priority, Key uint64
	Value         T
}

// Less orders items by priority, then key (so ties, which need equal
// 64-bit priorities, are still broken the same way everywhere).
func Less(aPriority, aKey, bPriority, bKey uint64) bool {
	if aPriority != bPriority {
		return aPriority < bPriority
	}
	return aKey < bKey
}

func less[T any](a, b Item[T]) bool { return Less(a.Priority, a.Key, b.Priority, b.Key) }

// BottomK keeps the k items of smallest priority seen so far.
type BottomK[T any] struct {
	K    int
	Seed uint64
	h    maxHeap[T]
}

// NewBottomK returns an empty bottom-k sample of size k >= 1.
func NewBottomK[T any](k int, seed uint64) *BottomK[T] {
	return &BottomK[T]{K: max(k, 1), Seed: seed}
}

// Add offers an item with its stable key.
func (b *BottomK[T]) Add(key uint64, v T) {
	b.AddItem(Item[T]{Priority: Priority(b.Seed, key), Key: key, Value: v})
}

// AddItem offers an item whose priority is already computed.
func (b *BottomK[T]) AddItem(it Item[T]) {
	if len(b.h) < b.K {
		heap.Push(&b.h, it)
		return
	}
	if less(it, b.h[0]) {
		b.h[0] = it
		heap.Fix(&b.h, 0)
	}
}

// Merge adds every item of o (a sample with the same seed) to b.
func (b *BottomK[T]) Merge(o *BottomK[T]) {
	for _, it := range o.h {
		b.AddItem(it)
	}
}

// Items returns the sample, ordered by priority.
func (b *BottomK[T]) Items() []Item[T] {
	out := append([]Item[T](nil), b.h...)
	sort.Slice(out, func(i, j int) bool { return less(out[i], out[j]) })
	return out
}

// maxHeap is a max-heap by (priority, key): its root is the item the next
// smaller one evicts.
type maxHeap[T any] []Item[T]

func (h maxHeap[T]) Len() int           { return len(h) }
func (h maxHeap[T]) Less(i, j int) bool { return less(h[j], h[i]) }
func (h maxHeap[T]) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *maxHeap[T]) Push(x any)        { *h = append(*h, x.(Item[T])) }
func (h *maxHeap[T]) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}
