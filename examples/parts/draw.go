package main

// The images of this example are invented: every one is drawn by the code
// in this file, procedurally, from a seeded random source. They are
// silhouettes of five kinds of machine part, made up for the demo; they
// come from no catalogue, scan or photograph.

import (
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sync"

	"lowerbound.dev/vae/dataset"
)

// Side is the width and height of every image, in pixels.
const Side = 28

// superSample is the number of sub-samples per pixel along each axis: a
// pixel's value is the fraction of its superSample x superSample sample
// points (at the centres of a regular sub-grid) that fall inside the shape,
// a simple box-filter anti-aliasing.
const superSample = 4

// Part is one kind of machine part.
type Part int

// The five kinds, in label order.
const (
	Washer  Part = iota // a flat ring (annulus)
	HexNut              // a regular hexagon with a round hole
	Bracket             // an L-shaped angle plate with a hole in each arm
	Gear                // a toothed disc with a round hole
	Spring              // a zig-zag stroke with straight leads at both ends
	numParts
)

// NumParts is the number of kinds, the number of classes of the model.
const NumParts = int(numParts)

// String returns the part's display name.
func (p Part) String() string {
	switch p {
	case Washer:
		return "washer"
	case HexNut:
		return "hex nut"
	case Bracket:
		return "bracket"
	case Gear:
		return "gear"
	case Spring:
		return "spring"
	}
	return fmt.Sprintf("Part(%d)", int(p))
}

// shape reports whether the point (x, y), in the part's own frame (pixel
// units, origin at the part's centre, y pointing down), is inside the part.
type shape func(x, y float64) bool

// pose places a part in the image: the centre (pixels from the top-left
// corner) and the rotation (radians, clockwise on screen).
type pose struct {
	cx, cy, angle float64
}

// render rasterises s under pose p into a Side*Side image, row-major, each
// value the covered fraction of the pixel, in [0, 1]. extent bounds the
// shape: every inside point is within extent of the part's centre, so
// pixels farther away are skipped.
func render(s shape, p pose, extent float64) []float64 {
	img := make([]float64, Side*Side)
	cos, sin := math.Cos(p.angle), math.Sin(p.angle)
	const n = superSample
	inv := 1 / float64(n*n)
	reach := extent + math.Sqrt2 // a pixel's corners lie within sqrt(2)/2 of its centre
	for py := 0; py < Side; py++ {
		for px := 0; px < Side; px++ {
			dx, dy := float64(px)+0.5-p.cx, float64(py)+0.5-p.cy
			if dx*dx+dy*dy > reach*reach {
				continue
			}
			hits := 0
			for j := 0; j < n; j++ {
				for i := 0; i < n; i++ {
					// sample point in image coordinates, then into the
					// part's frame by the inverse rotation
					ix := float64(px) + (float64(i)+0.5)/n - p.cx
					iy := float64(py) + (float64(j)+0.5)/n - p.cy
					if s(cos*ix+sin*iy, -sin*ix+cos*iy) {
						hits++
					}
				}
			}
			img[py*Side+px] = float64(hits) * inv
		}
	}
	return img
}

// washerShape is the ring between radii inner and outer.
func washerShape(outer, inner float64) shape {
	return func(x, y float64) bool {
		r2 := x*x + y*y
		return r2 <= outer*outer && r2 >= inner*inner
	}
}

// hexNutShape is a regular hexagon of circumradius corner (flat sides at
// distance corner*sqrt(3)/2 from the centre) minus a round hole.
func hexNutShape(corner, hole float64) shape {
	apothem := corner * math.Sqrt(3) / 2
	return func(x, y float64) bool {
		if x*x+y*y < hole*hole {
			return false
		}
		// the three side normals are 60 degrees apart: (0,1), (+-sqrt3/2, 1/2)
		const c = 0.8660254037844386 // sqrt(3)/2
		return math.Abs(y) <= apothem && math.Abs(c*x+0.5*y) <= apothem && math.Abs(c*x-0.5*y) <= apothem
	}
}

// bracketShape is an L of two arms of length arm and width thick that meet
// in a square corner, with a round hole of radius hole on the centre line
// of each arm, holeAt from the arm's free end. The L's bounding square is
// centred on the origin.
func bracketShape(arm, thick, hole, holeAt float64) shape {
	h := arm / 2
	// corner square at (-h, -h); arms run along +x (bottom) and +y.
	return func(x, y float64) bool {
		inBottom := x >= -h && x <= h && y >= h-thick && y <= h
		inSide := x >= -h && x <= -h+thick && y >= -h && y <= h
		if !inBottom && !inSide {
			return false
		}
		// hole in the bottom arm near its right end, and in the side arm
		// near its top end
		bx, by := x-(h-holeAt), y-(h-thick/2)
		sx, sy := x-(-h+thick/2), y-(-h+holeAt)
		return bx*bx+by*by > hole*hole && sx*sx+sy*sy > hole*hole
	}
}

// Fractions of a gear's tooth period taken by the rising flank, the flat
// top and the falling flank; the rest is the gap at the root radius.
const (
	gearRise = 0.12
	gearTop  = 0.30
	gearFall = 0.12
)

// gearShape is a disc of root radius root with teeth up to radius tip and
// a round hole. Each tooth period (2*pi/teeth) is a trapezoid: a rising
// flank, a flat top, a falling flank and a gap, in the fractions below.
func gearShape(tip, root, hole float64, teeth int) shape {
	const rise, top, fall = gearRise, gearTop, gearFall
	return func(x, y float64) bool {
		r2 := x*x + y*y
		if r2 < hole*hole || r2 > tip*tip {
			return false
		}
		if r2 <= root*root {
			return true
		}
		phase := (math.Atan2(y, x)/(2*math.Pi) + 1) * float64(teeth)
		phase -= math.Floor(phase)
		var h float64
		switch {
		case phase < rise:
			h = phase / rise
		case phase < rise+top:
			h = 1
		case phase < rise+top+fall:
			h = 1 - (phase-rise-top)/fall
		}
		r := root + (tip-root)*h
		return r2 <= r*r
	}
}

// springShape is a stroke of width width along a polyline: a straight lead,
// coils zig-zags of amplitude amp across the axis, and another lead, the
// whole length long and centred on the origin along x.
func springShape(length, amp, width float64, coils int) (shape, []vec) {
	lead := length * 0.12
	pts := []vec{{-length / 2, 0}, {-length/2 + lead, 0}}
	body := length - 2*lead
	step := body / float64(2*coils)
	for k := 0; k < 2*coils; k++ {
		y := amp
		if k%2 == 1 {
			y = -amp
		}
		pts = append(pts, vec{-length/2 + lead + step*(float64(k)+0.5), y})
	}
	pts = append(pts, vec{length/2 - lead, 0}, vec{length / 2, 0})
	half := width / 2
	return func(x, y float64) bool {
		if math.Abs(y) > amp+half || math.Abs(x) > length/2+half {
			return false
		}
		p := vec{x, y}
		for i := 1; i < len(pts); i++ {
			a, b := pts[i-1], pts[i] // x increases along the polyline
			if x < a.x-half || x > b.x+half {
				continue
			}
			if segmentDist2(p, a, b) <= half*half {
				return true
			}
		}
		return false
	}, pts
}

type vec struct{ x, y float64 }

// segmentDist2 is the squared distance from p to the segment a-b.
func segmentDist2(p, a, b vec) float64 {
	abx, aby := b.x-a.x, b.y-a.y
	apx, apy := p.x-a.x, p.y-a.y
	t := (apx*abx + apy*aby) / (abx*abx + aby*aby)
	t = math.Max(0, math.Min(1, t))
	dx, dy := apx-t*abx, apy-t*aby
	return dx*dx + dy*dy
}

// uniform returns a draw from U(lo, hi).
func uniform(rng *rand.Rand, lo, hi float64) float64 { return lo + (hi-lo)*rng.Float64() }

// Ranges of the style shared by every part type.
const (
	maxTilt = 12 * math.Pi / 180 // rotation within +-maxTilt of the upright pose
	jitter  = 1                  // centre within +-jitter pixels of the image centre
)

// style holds the nuisance variables that every part type shares, so that
// "the same style" means the same thing for a washer and for a spring.
type style struct {
	size  float64 // 0 smallest .. 1 largest
	thick float64 // 0 thinnest .. 1 thickest walls or stroke
	tilt  float64 // rotation, radians, within +-maxTilt
	dx    float64 // offset of the centre, pixels, within +-jitter
	dy    float64
}

// randomStyle draws a style uniformly over its ranges.
func randomStyle(rng *rand.Rand) style {
	return style{
		size:  rng.Float64(),
		thick: rng.Float64(),
		tilt:  uniform(rng, -maxTilt, maxTilt),
		dx:    uniform(rng, -jitter, jitter),
		dy:    uniform(rng, -jitter, jitter),
	}
}

// partShape returns the shape of part p in style st and the radius that
// bounds it. Details that are not part of the shared style (the spring's
// coil count and amplitude) are drawn from rng. Sizes are in pixels and
// chosen so that every part, tilted and offset, stays inside the frame.
func partShape(p Part, st style, rng *rand.Rand) (shape, float64, error) {
	lerp := func(lo, hi, t float64) float64 { return lo + (hi-lo)*t }
	switch p {
	case Washer:
		outer := lerp(7, 11, st.size)
		return washerShape(outer, outer*lerp(0.62, 0.35, st.thick)), outer, nil
	case HexNut:
		corner := lerp(7.5, 11.5, st.size)
		return hexNutShape(corner, corner*lerp(0.5, 0.3, st.thick)), corner, nil
	case Bracket:
		arm := lerp(13.5, 17.5, st.size)
		thick := arm * lerp(0.24, 0.36, st.thick)
		return bracketShape(arm, thick, thick*0.27, thick*0.7), arm / math.Sqrt2, nil
	case Gear:
		tip := lerp(8, 11.5, st.size)
		return gearShape(tip, tip*0.76, tip*lerp(0.42, 0.22, st.thick), 8), tip, nil
	case Spring:
		length := lerp(16, 21, st.size)
		amp := uniform(rng, 3, 5)
		width := lerp(1.4, 2.4, st.thick)
		s, _ := springShape(length, amp, width, 3+rng.IntN(2))
		return s, math.Hypot(length/2, amp) + width/2, nil
	}
	return nil, 0, fmt.Errorf("partShape: part: %d, want 0..%d", int(p), NumParts-1)
}

// drawPart draws part p in style st (see partShape for rng).
func drawPart(p Part, st style, rng *rand.Rand) ([]float64, error) {
	s, extent, err := partShape(p, st, rng)
	if err != nil {
		return nil, err
	}
	return render(s, pose{cx: Side/2 + st.dx, cy: Side/2 + st.dy, angle: st.tilt}, extent), nil
}

// drawRandom draws part p in a random style.
func drawRandom(p Part, rng *rand.Rand) ([]float64, error) {
	return drawPart(p, randomStyle(rng), rng)
}

// makeSet draws n images for a data set: record i shows part (first+i) mod
// NumParts, labelled so, drawn from its own PCG stream (seed, first+i), so a
// record depends only on the seed and its index, not on how many goroutines
// draw. The Set has shape {1, Side, Side}.
func makeSet(n int, seed uint64, first int) (*dataset.Set, error) {
	if n < 1 {
		return nil, fmt.Errorf("makeSet: n: %d, want >= 1", n)
	}
	x := make([]float64, n*Side*Side)
	labels := make([]int, n)
	workers := min(runtime.GOMAXPROCS(0), n)
	errs := make([]error, workers)
	var wg sync.WaitGroup
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := w; i < n; i += workers {
				k := first + i
				labels[i] = k % NumParts
				img, err := drawRandom(Part(labels[i]), rand.New(rand.NewPCG(seed, uint64(k))))
				if err != nil {
					errs[w] = err
					return
				}
				copy(x[i*Side*Side:], img)
			}
		}()
	}
	wg.Wait()
	for _, err := range errs {
		if err != nil {
			return nil, err
		}
	}
	set, err := dataset.New(x, n, Side*Side)
	if err != nil {
		return nil, err
	}
	if set, err = set.WithLabels(labels, NumParts); err != nil {
		return nil, err
	}
	return set.WithShape(1, Side, Side)
}
