package main

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/floats"
)

// mass is the sum of an image's pixel values: the covered area in pixels.
func mass(img []float64) float64 { return floats.Sum(img) }

// samplingTolerance bounds the area error of render's point sampling for a
// shape whose boundary has length perimeter (pixels). render counts each
// sub-sample's cell (side h = 1/superSample) as wholly in or out, so only
// cells that the boundary crosses can be wrong, and a curve of length P
// crosses at most about sqrt(2)*P/h cells of area h^2 (its Manhattan
// length is at most sqrt(2)*P). This worst case is loose: the errors of
// the cut cells mostly cancel, so a shape of the wrong size still fails
// when the mistake exceeds it, but a small one may pass.
func samplingTolerance(perimeter float64) float64 {
	h := 1.0 / superSample
	return math.Sqrt2 * perimeter * h
}

// offCentre places a part a little off the image centre, tilted, so that
// the sampling grid is not aligned with the shape.
func offCentre() pose { return pose{cx: 14.3, cy: 13.6, angle: 0.17} }

// TestShapeAreas compares the rendered pixel mass of each shape, with
// explicit parameters, to the shape's area from elementary geometry.
func TestShapeAreas(t *testing.T) {
	const n = 8 // gear teeth
	cases := []struct {
		name            string
		s               shape
		extent          float64
		area, perimeter float64 // exact area and boundary length
		areaLo, areaHi  float64 // used instead of area when area is 0
	}{
		{
			name: "washer", s: washerShape(10, 5), extent: 10,
			// reference: area of an annulus, pi*(R^2 - r^2)
			area: math.Pi * (100 - 25), perimeter: 2 * math.Pi * 15,
		},
		{
			name: "hex nut", s: hexNutShape(10, 4), extent: 10,
			// reference: area of a regular hexagon of circumradius R,
			// (3*sqrt(3)/2)*R^2, minus the hole pi*r^2
			area: 1.5*math.Sqrt(3)*100 - math.Pi*16, perimeter: 60 + 2*math.Pi*4,
		},
		{
			name: "bracket", s: bracketShape(16, 5, 1.4, 3.5), extent: 16 / math.Sqrt2,
			// reference: an L of two arms of length a and width t is
			// 2*a*t - t^2 (the corner square counted once), minus two
			// round holes that lie wholly inside the arms
			area: 2*16*5 - 25 - 2*math.Pi*1.4*1.4, perimeter: 4*16 + 2*2*math.Pi*1.4,
		},
		{
			name: "gear", s: gearShape(11, 8.5, 3, n), extent: 11,
			// reference: polar area (1/2) * integral of r(theta)^2. Over
			// one tooth period P the radius is linear on each flank, so
			// the flank integral of r^2 is (fraction*P)*(r0^2 + r0*r1 +
			// r1^2)/3 (integral of a squared linear function); the top
			// and the gap are arcs at r1 and r0.
			area: func() float64 {
				r0, r1, p := 8.5, 11.0, 2*math.Pi/n
				flank := (r0*r0 + r0*r1 + r1*r1) / 3
				perTooth := (gearRise+gearFall)*p*flank + gearTop*p*r1*r1 + (1-gearRise-gearTop-gearFall)*p*r0*r0
				return 0.5*n*perTooth - math.Pi*9
			}(),
			perimeter: 2*math.Pi*11 + 2*n*(11-8.5) + 2*math.Pi*3,
		},
	}
	for _, c := range cases {
		img := render(c.s, offCentre(), c.extent)
		got, tol := mass(img), samplingTolerance(c.perimeter)
		if math.Abs(got-c.area) > tol {
			t.Errorf("%s: mass %.2f, want area %.2f +- %.2f", c.name, got, c.area, tol)
		}
	}
}

// TestSpringArea checks the stroke against bounds for the area of a tube
// of radius rho around a curve: at least 2*rho*L when every line across
// the axis (length L) meets the curve (Cavalieri's principle: each such
// line cuts the tube in a chord of length >= 2*rho), and at most
// pi*rho^2 + 2*rho*ell for a curve of length ell (sweeping the disc along
// the curve adds at most its width across the motion, 2*rho, per unit of
// length; standing still at a corner adds nothing).
func TestSpringArea(t *testing.T) {
	const length, amp, width = 20.0, 4.0, 2.0
	s, pts := springShape(length, amp, width, 4)
	ell := 0.0
	for i := 1; i < len(pts); i++ {
		ell += math.Hypot(pts[i].x-pts[i-1].x, pts[i].y-pts[i-1].y)
	}
	rho := width / 2
	lo, hi := 2*rho*length, 2*rho*ell+math.Pi*rho*rho
	got := mass(render(s, offCentre(), math.Hypot(length/2, amp)+rho))
	tol := samplingTolerance(2*ell + 2*math.Pi*rho)
	if got < lo-tol || got > hi+tol {
		t.Errorf("spring: mass %.2f, want within [%.2f, %.2f] +- %.2f", got, lo, hi, tol)
	}
}

// TestRenderAntialiased checks that render's values are coverage fractions:
// in [0, 1], multiples of 1/superSample^2, with partial values on edges.
func TestRenderAntialiased(t *testing.T) {
	img := render(washerShape(10, 5), offCentre(), 10)
	partial := 0
	for i, v := range img {
		if v < 0 || v > 1 {
			t.Fatalf("pixel %d is %v, want within [0, 1]", i, v)
		}
		k := v * superSample * superSample
		if math.Abs(k-math.Round(k)) > 1e-9 {
			t.Fatalf("pixel %d is %v, not a multiple of 1/%d", i, v, superSample*superSample)
		}
		if v > 0 && v < 1 {
			partial++
		}
	}
	// Both circles cross about 2*pi*r pixels; require at least half that
	// many partial pixels (a non-antialiased raster would have none).
	if want := 47; partial < want { // floor(pi*15)
		t.Errorf("%d partially covered pixels, want >= %d", partial, want)
	}
}

// TestMakeSetDeterministic checks that a data set depends only on the seed
// and the record indices.
func TestMakeSetDeterministic(t *testing.T) {
	a, err := makeSet(20, 7, 0)
	if err != nil {
		t.Fatal(err)
	}
	b, err := makeSet(20, 7, 0)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(a.Values(), b.Values()) || !slices.Equal(a.Labels(), b.Labels()) {
		t.Error("two sets with the same seed differ")
	}
	// records 5..14 of a are records 0..9 of a set that starts at 5
	tail, err := makeSet(10, 7, 5)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 10; i++ {
		if !slices.Equal(tail.Row(i), a.Row(5+i)) || tail.Label(i) != a.Label(5+i) {
			t.Errorf("record %d of the set starting at 5 differs from record %d of the full set", i, 5+i)
		}
	}
	c, err := makeSet(20, 8, 0)
	if err != nil {
		t.Fatal(err)
	}
	if slices.Equal(a.Values(), c.Values()) {
		t.Error("sets with seeds 7 and 8 are identical")
	}
	if got := a.Shape(); !slices.Equal(got, []int{1, Side, Side}) {
		t.Errorf("shape %v, want [1 %d %d]", got, Side, Side)
	}
	for i := 0; i < a.Len(); i++ {
		if a.Label(i) != i%NumParts {
			t.Fatalf("record %d has label %d, want %d", i, a.Label(i), i%NumParts)
		}
	}
	if _, err := makeSet(0, 1, 0); err == nil {
		t.Error("makeSet(0, ...) gave no error")
	}
	if _, err := drawPart(Part(NumParts), style{}, rand.New(rand.NewPCG(1, 1))); err == nil {
		t.Error("drawPart of an unknown part gave no error")
	}
}

// TestRandomPartMass draws many parts of each type in random styles and
// checks that each one's mass lies between the areas of the smallest and
// the largest part of its type (from the size ranges in partShape and the
// formulas of TestShapeAreas), and that parts stay off the outermost ring
// of pixels.
func TestRandomPartMass(t *testing.T) {
	hex := func(r, h float64) float64 { return 1.5*math.Sqrt(3)*r*r - math.Pi*h*h }
	disc := func(r float64) float64 { return math.Pi * r * r }
	// [lo, hi] per part type, before the sampling tolerance.
	bounds := [NumParts][2]float64{
		// smallest washer: outer 7, inner 0.62*7; largest: 11 and 0.35*11
		Washer: {disc(7) - disc(0.62*7), disc(11) - disc(0.35*11)},
		HexNut: {hex(7.5, 0.5*7.5), hex(11.5, 0.3*11.5)},
		// arm a, width t = k*a, holes of radius 0.27*t
		Bracket: {2*13.5*0.24*13.5 - math.Pow(0.24*13.5, 2) - 2*disc(0.27*0.24*13.5),
			2*17.5*0.36*17.5 - math.Pow(0.36*17.5, 2) - 2*disc(0.27*0.36*17.5)},
		// between the root disc and the tip disc, minus the hole
		Gear: {disc(0.76*8) - disc(0.42*8), disc(11.5) - disc(0.22*11.5)},
		// stroke width w along at least the axis length L (see
		// TestSpringArea); at most w times a generous path length of
		// 3L (the zig-zag with amplitude <= 5 and 3 or 4 coils over
		// 76% of the length is well under that) plus the end caps
		Spring: {16 * 1.4, 3*21*2.4 + disc(1.2)},
	}
	rng := rand.New(rand.NewPCG(3, 4))
	for p := range NumParts {
		lo, hi := bounds[p][0], bounds[p][1]
		tol := samplingTolerance(2 * math.Pi * 11.5 * 2) // generous perimeter for any part
		if p == int(Spring) {
			tol = samplingTolerance(2 * 3 * 21)
		}
		for k := 0; k < 100; k++ {
			img, err := drawRandom(Part(p), rng)
			if err != nil {
				t.Fatal(err)
			}
			if m := mass(img); m < lo-tol || m > hi+tol {
				t.Errorf("%s %d: mass %.1f, want within [%.1f, %.1f] +- %.1f", Part(p), k, m, lo, hi, tol)
			}
			for i := 0; i < Side; i++ {
				if img[i] != 0 || img[(Side-1)*Side+i] != 0 || img[i*Side] != 0 || img[i*Side+Side-1] != 0 {
					t.Errorf("%s %d touches the border at row or column %d", Part(p), k, i)
					break
				}
			}
		}
	}
}

// TestPartTypesDiffer checks that the types are told apart by a nearest
// class-mean classifier in pixel space, trained on one set and tested on
// another. Chance is 1/NumParts = 0.2. The three round types (washer, hex
// nut, gear) differ only in their outlines while their sizes vary, so a
// classifier this crude confuses them often; the threshold 0.6, three
// times chance, still needs most images told apart. Two types drawn alike
// would have nearly equal mean images: L1 distance near 0, where at least
// 20 pixels of mass are required below.
func TestPartTypesDiffer(t *testing.T) {
	train, err := makeSet(500, 11, 0)
	if err != nil {
		t.Fatal(err)
	}
	test, err := makeSet(250, 11, 500)
	if err != nil {
		t.Fatal(err)
	}
	means := make([][]float64, NumParts)
	for p := range means {
		means[p] = make([]float64, Side*Side)
	}
	for i := 0; i < train.Len(); i++ {
		floats.Add(means[train.Label(i)], train.Row(i))
	}
	for p := range means {
		floats.Scale(1/float64(train.Len()/NumParts), means[p])
	}
	// pairwise: no two class means may be close
	for a := range NumParts {
		for b := a + 1; b < NumParts; b++ {
			if d := floats.Distance(means[a], means[b], 1); d < 20 {
				t.Errorf("mean images of %s and %s differ by only %.1f pixels (L1)", Part(a), Part(b), d)
			}
		}
	}
	correct := 0
	for i := 0; i < test.Len(); i++ {
		best, bestD := -1, math.Inf(1)
		for p := range means {
			if d := floats.Distance(test.Row(i), means[p], 2); d < bestD {
				best, bestD = p, d
			}
		}
		if best == test.Label(i) {
			correct++
		}
	}
	if acc := float64(correct) / float64(test.Len()); acc < 0.6 {
		t.Errorf("nearest class-mean accuracy %.3f, want >= 0.6", acc)
	}
}

func TestPartString(t *testing.T) {
	seen := map[string]bool{}
	for p := range NumParts {
		s := Part(p).String()
		if s == "" || seen[s] {
			t.Errorf("part %d has an empty or repeated name %q", p, s)
		}
		seen[s] = true
	}
	if got := Part(99).String(); got != "Part(99)" {
		t.Errorf("Part(99).String() = %q", got)
	}
}
