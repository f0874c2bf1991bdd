package dataset

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// grid returns n records of f features with value 10*i + j at record i,
// feature j, so every value tells where it came from.
func grid(n, f int) []float64 {
	x := make([]float64, n*f)
	for i := range n {
		for j := range f {
			x[i*f+j] = float64(10*i + j)
		}
	}
	return x
}

func mustErr(t *testing.T, err error, target error, parts ...string) {
	t.Helper()
	if err == nil {
		t.Fatalf("no error, want one wrapping %v mentioning %q", target, parts)
	}
	if !errors.Is(err, target) {
		t.Fatalf("error %q does not wrap %v", err, target)
	}
	for _, p := range parts {
		if !strings.Contains(err.Error(), p) {
			t.Fatalf("error %q does not mention %q", err, p)
		}
	}
}

func TestNewCopiesAndValidates(t *testing.T) {
	x := grid(3, 2)
	s, err := New(x, 3, 2)
	if err != nil {
		t.Fatal(err)
	}
	x[0] = -1
	if got := s.Row(0); !slices.Equal(got, []float64{0, 1}) {
		t.Fatalf("Row(0) = %v after changing the caller's slice; New must copy", got)
	}
	if s.Len() != 3 || s.Features() != 2 || !slices.Equal(s.Shape(), []int{2}) {
		t.Fatalf("Len %d Features %d Shape %v", s.Len(), s.Features(), s.Shape())
	}
	if s.Row(3) != nil || s.Row(-1) != nil {
		t.Fatal("Row out of range must be nil")
	}
	if s.HasLabels() || s.Label(0) != -1 || s.Classes() != 0 {
		t.Fatal("unlabelled Set reports labels")
	}
	_, err = New(x, 2, 2)
	mustErr(t, err, ErrInvalidArgument, "dataset.New", "x")
	_, err = New(nil, 1, 0)
	mustErr(t, err, ErrInvalidArgument, "dataset.New", "f")
	_, err = New(nil, -1, 1)
	mustErr(t, err, ErrInvalidArgument, "dataset.New", "n")
	_, err = New([]float64{1, 2, 3, math.NaN()}, 2, 2)
	mustErr(t, err, ErrInvalidData, "record 1, feature 1")
	_, err = New([]float64{1, math.Inf(-1), 3, 4}, 2, 2)
	mustErr(t, err, ErrInvalidData, "record 0, feature 1")
	empty, err := New(nil, 0, 3)
	if err != nil || empty.Len() != 0 {
		t.Fatalf("empty Set: %v, %v", empty, err)
	}
}

func TestFromRowsAndMatrix(t *testing.T) {
	s, err := FromRows([][]float64{{1, 2, 3}, {4, 5, 6}})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(s.Values(), []float64{1, 2, 3, 4, 5, 6}) {
		t.Fatalf("values %v", s.Values())
	}
	_, err = FromRows([][]float64{{1, 2}, {3}})
	mustErr(t, err, ErrInvalidArgument, "row 1")
	_, err = FromRows(nil)
	mustErr(t, err, ErrInvalidArgument, "rows")
	_, err = FromRows([][]float64{{1}, {math.NaN()}})
	mustErr(t, err, ErrInvalidData, "record 1, feature 0")

	// reference: gonum mat.Dense.At gives the element each record must hold.
	m := mat.NewDense(4, 3, grid(4, 3))
	s, err = FromMatrix(m.T()) // a transposed view exercises the generic path
	if err != nil {
		t.Fatal(err)
	}
	if s.Len() != 3 || s.Features() != 4 {
		t.Fatalf("FromMatrix(T) is %dx%d, want 3x4", s.Len(), s.Features())
	}
	for i := range 3 {
		for j := range 4 {
			if got, want := s.Row(i)[j], m.At(j, i); got != want {
				t.Fatalf("record %d feature %d = %v, want %v", i, j, got, want)
			}
		}
	}
	bad := mat.NewDense(2, 2, []float64{0, 0, math.Inf(1), 0})
	_, err = FromMatrix(bad)
	mustErr(t, err, ErrInvalidData, "record 1, feature 0")
	_, err = FromMatrix(nil)
	mustErr(t, err, ErrInvalidArgument, "m")
}

func TestLabelsAndShape(t *testing.T) {
	s, _ := New(grid(4, 6), 4, 6)
	l, err := s.WithLabels([]int{2, 0, 1, 2}, 0)
	if err != nil {
		t.Fatal(err)
	}
	if l.Classes() != 3 || l.Label(3) != 2 || !l.HasLabels() || s.HasLabels() {
		t.Fatalf("inferred classes %d, label(3) %d; original must stay unlabelled", l.Classes(), l.Label(3))
	}
	l5, err := s.WithLabels([]int{2, 0, 1, 2}, 5)
	if err != nil || l5.Classes() != 5 {
		t.Fatalf("explicit classes: %v %v", l5.Classes(), err)
	}
	_, err = s.WithLabels([]int{0, 1, 2}, 3)
	mustErr(t, err, ErrInvalidArgument, "labels")
	_, err = s.WithLabels([]int{0, 1, 3, 0}, 3)
	mustErr(t, err, ErrInvalidData, "record 2", "label 3")
	_, err = s.WithLabels([]int{0, -1, 0, 0}, 0)
	mustErr(t, err, ErrInvalidData, "record 1", "label -1")

	img, err := l.WithShape(1, 2, 3)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(img.Shape(), []int{1, 2, 3}) || img.Label(0) != 2 {
		t.Fatalf("shape %v label %d", img.Shape(), img.Label(0))
	}
	_, err = s.WithShape(2, 2)
	mustErr(t, err, ErrInvalidArgument, "shape", "4 values", "6 features")
	_, err = s.WithShape(0, 6)
	mustErr(t, err, ErrInvalidArgument, "shape")
}

func TestSubset(t *testing.T) {
	s, _ := New(grid(5, 2), 5, 2)
	s, _ = s.WithLabels([]int{0, 1, 2, 3, 4}, 0)
	s, _ = s.WithShape(2, 1)
	sub, err := s.Subset([]int{4, 1, 1})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(sub.Values(), []float64{40, 41, 10, 11, 10, 11}) {
		t.Fatalf("values %v", sub.Values())
	}
	if !slices.Equal(sub.Labels(), []int{4, 1, 1}) || sub.Classes() != 5 || !slices.Equal(sub.Shape(), []int{2, 1}) {
		t.Fatalf("labels %v classes %d shape %v", sub.Labels(), sub.Classes(), sub.Shape())
	}
	_, err = s.Subset([]int{0, 5})
	mustErr(t, err, ErrInvalidArgument, "idx[1] = 5")
}

func TestSplit(t *testing.T) {
	const n = 50
	s, _ := New(grid(n, 1), n, 1) // record i holds 10*i
	labels := make([]int, n)
	for i := range labels {
		labels[i] = i % 3
	}
	s, _ = s.WithLabels(labels, 3)
	a, b, err := s.Split(0.3, 9)
	if err != nil {
		t.Fatal(err)
	}
	if a.Len() != 15 || b.Len() != 35 {
		t.Fatalf("sizes %d, %d; want round(0.3*50) = 15 and 35", a.Len(), b.Len())
	}
	seen := make([]int, n)
	for _, part := range []*Set{a, b} {
		prev := -1
		for k := range part.Len() {
			i := int(part.Row(k)[0]) / 10
			if i <= prev {
				t.Fatalf("part not in original order: %d after %d", i, prev)
			}
			prev = i
			seen[i]++
			if part.Label(k) != i%3 {
				t.Fatalf("record %d carries label %d, want %d", i, part.Label(k), i%3)
			}
		}
	}
	for i, c := range seen {
		if c != 1 {
			t.Fatalf("record %d in %d parts", i, c)
		}
	}
	a2, _, _ := s.Split(0.3, 9)
	if !slices.Equal(a.Values(), a2.Values()) {
		t.Fatal("same seed, different split")
	}
	a3, _, _ := s.Split(0.3, 10)
	// C(50,15) ~ 2e12 possible subsets: a collision means the seed is ignored.
	if slices.Equal(a.Values(), a3.Values()) {
		t.Fatal("different seeds, same split")
	}
	all, none, err := s.Split(1, 0)
	if err != nil || all.Len() != n || none.Len() != 0 {
		t.Fatalf("frac 1: %d, %d, %v", all.Len(), none.Len(), err)
	}
	for _, f := range []float64{-0.1, 1.5, math.NaN()} {
		_, _, err = s.Split(f, 0)
		mustErr(t, err, ErrInvalidArgument, "frac")
	}
}

func TestFill(t *testing.T) {
	s, _ := New(grid(4, 3), 4, 3)
	d64 := make([]float64, 8)
	for i := range d64 {
		d64[i] = -7
	}
	if err := s.Fill(d64, []int{2, 0}); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(d64, []float64{20, 21, 22, 0, 1, 2, -7, -7}) {
		t.Fatalf("float64 fill %v", d64)
	}
	d32 := make([]float32, 3)
	if err := s.Fill(d32, []int{3}); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(d32, []float32{30, 31, 32}) {
		t.Fatalf("float32 fill %v", d32)
	}
	mustErr(t, s.Fill(make([]float64, 5), []int{0, 1}), ErrInvalidArgument, "dst", "at least 6")
	mustErr(t, s.Fill(make([]int, 6), []int{0, 1}), ErrInvalidArgument, "dst", "[]int")
	mustErr(t, s.Fill(d64, []int{4}), ErrInvalidArgument, "idx[0] = 4")
}

func TestFillOneHot(t *testing.T) {
	s, _ := New(grid(3, 1), 3, 1)
	mustErr(t, s.FillOneHot(make([]float64, 9), []int{0}), ErrInvalidArgument, "no labels")
	s, _ = s.WithLabels([]int{2, 0, 1}, 3)
	d := []float32{9, 9, 9, 9, 9, 9, 9}
	if err := s.FillOneHot(d, []int{0, 1}); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(d, []float32{0, 0, 1, 1, 0, 0, 9}) {
		t.Fatalf("one-hot %v", d)
	}
	mustErr(t, s.FillOneHot(make([]float64, 5), []int{0, 1}), ErrInvalidArgument, "dst")
}

func TestBinarizeAndScale(t *testing.T) {
	s, _ := New([]float64{0, 127, 128, 255}, 2, 2)
	b, err := s.Binarize(128)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(b.Values(), []float64{0, 0, 1, 1}) || !slices.Equal(s.Values(), []float64{0, 127, 128, 255}) {
		t.Fatalf("binarized %v, original %v", b.Values(), s.Values())
	}
	sc, err := s.Scale(0.5)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(sc.Values(), []float64{0, 63.5, 64, 127.5}) {
		t.Fatalf("scaled %v", sc.Values())
	}
	_, err = s.Scale(0)
	mustErr(t, err, ErrInvalidArgument, "factor")
	_, err = s.Scale(math.MaxFloat64) // 127 * MaxFloat64 overflows first
	mustErr(t, err, ErrInvalidData, "record 0, feature 1")
	_, err = s.Binarize(math.NaN())
	mustErr(t, err, ErrInvalidArgument, "threshold")
}
