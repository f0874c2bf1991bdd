package dataset_test

import (
	"context"
	"path/filepath"
	"slices"
	"testing"

	"lowerbound.dev/internal/mnist"
	"lowerbound.dev/vae/dataset"
)

// TestRealMNIST reads the real MNIST files, located by internal/mnist, and
// checks facts published about the data set. It is skipped with -short and
// when the files cannot be located (no go command, no network, no cache).
func TestRealMNIST(t *testing.T) {
	if testing.Short() {
		t.Skip("reads 55 MB of MNIST; skipped with -short")
	}
	dir, err := mnist.Dir(context.Background())
	if err != nil {
		t.Skipf("MNIST files not available: %v", err)
	}
	cases := []struct {
		images, labels string
		n, first       int
		counts         [10]int
	}{
		// Sizes: the MNIST database page (60000 training, 10000 test images
		// of 28x28 pixels). The first labels (5 for training, 7 for test)
		// and the per-digit counts are widely cited figures, recalled from
		// memory; each set of counts sums to its set's size.
		{mnist.TrainImages, mnist.TrainLabels, 60000, 5,
			[10]int{5923, 6742, 5958, 6131, 5842, 5421, 5918, 6265, 5851, 5949}},
		{mnist.TestImages, mnist.TestLabels, 10000, 7,
			[10]int{980, 1135, 1032, 1010, 982, 892, 958, 1028, 974, 1009}},
	}
	for _, c := range cases {
		s, err := dataset.LoadIDX(filepath.Join(dir, c.images), filepath.Join(dir, c.labels), dataset.IDXOptions{Classes: 10})
		if err != nil {
			t.Fatal(err)
		}
		if s.Len() != c.n || s.Features() != 784 || !slices.Equal(s.Shape(), []int{1, 28, 28}) || s.Classes() != 10 {
			t.Fatalf("%s: %d records, %d features, shape %v, %d classes", c.images, s.Len(), s.Features(), s.Shape(), s.Classes())
		}
		if s.Label(0) != c.first {
			t.Errorf("%s: first label %d, want %d", c.labels, s.Label(0), c.first)
		}
		var counts [10]int
		for _, l := range s.Labels() {
			counts[l]++
		}
		if counts != c.counts {
			t.Errorf("%s: label counts %v, want %v", c.labels, counts, c.counts)
		}
		lo, hi := 255.0, 0.0
		for i := range s.Len() {
			for _, v := range s.Row(i) {
				if v != float64(int(v)) {
					t.Fatalf("%s: record %d: pixel %v is not a whole number", c.images, i, v)
				}
				lo, hi = min(lo, v), max(hi, v)
			}
		}
		// Pixels are unsigned bytes, background 0 and full ink 255.
		if lo != 0 || hi != 255 {
			t.Errorf("%s: pixel range [%v, %v], want [0, 255]", c.images, lo, hi)
		}
	}
}
