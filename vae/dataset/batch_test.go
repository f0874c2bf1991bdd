package dataset

import (
	"errors"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

func TestBatchesCoverEveryIndexOnce(t *testing.T) {
	for _, n := range []int{0, 1, 7, 10, 100} {
		for _, size := range []int{1, 3, 10, 128} {
			for _, seeded := range []bool{false, true} {
				var rng *rand.Rand
				if seeded {
					rng = rand.New(rand.NewPCG(uint64(n), uint64(size)))
				}
				b, err := Batches(n, size, rng)
				if err != nil {
					t.Fatalf("n=%d size=%d: %v", n, size, err)
				}
				wantBatches := (n + size - 1) / size
				if len(b) != wantBatches {
					t.Fatalf("n=%d size=%d: %d batches, want %d", n, size, len(b), wantBatches)
				}
				seen := make([]int, n)
				var flat []int
				for k, batch := range b {
					want := size
					if k == len(b)-1 {
						want = n - (len(b)-1)*size // ragged last batch
					}
					if len(batch) != want {
						t.Fatalf("n=%d size=%d: batch %d has %d indices, want %d", n, size, k, len(batch), want)
					}
					for _, i := range batch {
						if i < 0 || i >= n {
							t.Fatalf("n=%d size=%d: index %d out of range", n, size, i)
						}
						seen[i]++
						flat = append(flat, i)
					}
				}
				for i, c := range seen {
					if c != 1 {
						t.Fatalf("n=%d size=%d seeded=%v: index %d seen %d times", n, size, seeded, i, c)
					}
				}
				if !seeded {
					for i, v := range flat {
						if v != i {
							t.Fatalf("n=%d size=%d: nil rng must keep order, position %d holds %d", n, size, i, v)
						}
					}
				}
			}
		}
	}
}

func TestBatchesRaggedLast(t *testing.T) {
	b, err := Batches(10, 4, nil)
	if err != nil {
		t.Fatal(err)
	}
	want := [][]int{{0, 1, 2, 3}, {4, 5, 6, 7}, {8, 9}}
	if len(b) != len(want) {
		t.Fatalf("batches %v, want %v", b, want)
	}
	for k := range want {
		if !slices.Equal(b[k], want[k]) {
			t.Fatalf("batches %v, want %v", b, want)
		}
	}
	// Appending to one batch must not overwrite the next (capacity is clipped).
	b[0] = append(b[0], 99)
	if b[1][0] != 4 {
		t.Fatalf("append to batch 0 overwrote batch 1: %v", b[1])
	}
}

func flatten(b [][]int) []int {
	var out []int
	for _, x := range b {
		out = append(out, x...)
	}
	return out
}

func TestBatchesSeeds(t *testing.T) {
	const n, size = 100, 16
	get := func(seed uint64) []int {
		b, err := Batches(n, size, rand.New(rand.NewPCG(seed, 0)))
		if err != nil {
			t.Fatal(err)
		}
		return flatten(b)
	}
	a1, a2, other := get(1), get(1), get(2)
	if !slices.Equal(a1, a2) {
		t.Fatal("same seed gave different orders")
	}
	// Two independent uniform permutations of 100 agree with probability
	// 1/100!, so equality here would be a bug, not bad luck.
	if slices.Equal(a1, other) {
		t.Fatal("different seeds gave the same order")
	}
	inOrder, _ := Batches(n, size, nil)
	if slices.Equal(a1, flatten(inOrder)) {
		t.Fatal("seeded order equals the identity")
	}
	// A reused generator advances: the next epoch has a fresh order.
	rng := rand.New(rand.NewPCG(1, 0))
	e1, _ := Batches(n, size, rng)
	e2, _ := Batches(n, size, rng)
	if slices.Equal(flatten(e1), flatten(e2)) {
		t.Fatal("two epochs from one generator have the same order")
	}
}

// TestBatchesUniform checks that the shuffle draws every permutation of 4
// indices equally often: a chi-squared goodness-of-fit test over the 24
// permutations with 48000 draws (2000 expected per cell).
func TestBatchesUniform(t *testing.T) {
	const n, draws = 4, 48000
	rng := rand.New(rand.NewPCG(42, 7))
	counts := map[[n]int]int{}
	for range draws {
		b, err := Batches(n, n, rng)
		if err != nil {
			t.Fatal(err)
		}
		var key [n]int
		copy(key[:], b[0])
		counts[key]++
	}
	if len(counts) != 24 {
		t.Fatalf("%d distinct permutations of 4, want 24", len(counts))
	}
	exp := float64(draws) / 24
	chi2 := 0.0
	for _, c := range counts {
		d := float64(c) - exp
		chi2 += d * d / exp
	}
	// reference: gonum stat/distuv ChiSquared, 23 degrees of freedom. The
	// 0.999 quantile makes a false alarm a 1-in-1000 event for a uniform
	// shuffle, while a biased one (e.g. the classic "swap with any index"
	// bug) exceeds it by orders of magnitude at this sample size.
	limit := distuv.ChiSquared{K: 23}.Quantile(0.999)
	if chi2 > limit {
		t.Fatalf("chi-squared %.1f > %.1f: shuffle not uniform (counts %v)", chi2, limit, counts)
	}
}

func TestBatchesBadArguments(t *testing.T) {
	if _, err := Batches(-1, 3, nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("n=-1: err %v, want ErrInvalidArgument", err)
	}
	if _, err := Batches(5, 0, nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("size=0: err %v, want ErrInvalidArgument", err)
	}
}
