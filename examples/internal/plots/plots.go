package plots

import (
	"errors"
	"fmt"
	"image/color"
	"math"
	"strconv"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/plotutil"
	"gonum.org/v1/plot/vg"
)

// Group is one named sample whose distribution is drawn.
type Group struct {
	Name   string
	Values []float64
	Color  color.Color // nil picks one from gonum/plot's palette
}

// Marker is a named vertical line, for example a threshold.
type Marker struct {
	Name string
	X    float64
}

// HistogramOptions configures Histograms.
type HistogramOptions struct {
	Title, XLabel string
	// Bins is the number of bins over [Min, Max]; zero means 50.
	Bins int
	// Min and Max bound the bins; when Max <= Min the range of all values
	// is used. Values outside the range are counted in the end bins.
	Min, Max float64
	// SignedLog draws the x axis, and spaces the bins, on the scale
	// sign(x) log10(1 + |x|), which keeps a few very large values from
	// squashing the rest while allowing zero and negative values. Ticks
	// are labelled in the original units.
	SignedLog bool
	Markers   []Marker
	// Width and Height of the image; zero means 9 by 5.5 inches.
	Width, Height vg.Length
}

// Histograms draws one step-outline histogram per group, over shared bins,
// each normalised to fractions of its own group so that groups of
// different sizes compare, and writes a PNG (or any format gonum/plot
// infers from the extension) to path.
func Histograms(path string, groups []Group, opt HistogramOptions) error {
	if len(groups) == 0 {
		return errors.New("plots.Histograms: no groups")
	}
	bins := opt.Bins
	if bins <= 0 {
		bins = 50
	}
	lo, hi := opt.Min, opt.Max
	if !(hi > lo) {
		lo, hi = math.Inf(1), math.Inf(-1)
		for _, g := range groups {
			for _, v := range g.Values {
				lo, hi = math.Min(lo, v), math.Max(hi, v)
			}
		}
		if math.IsInf(lo, 0) {
			return errors.New("plots.Histograms: no values")
		}
		if hi == lo {
			hi = lo + 1
		}
	}
	// tf maps values to plot coordinates and inv maps them back.
	tf, inv := func(x float64) float64 { return x }, func(x float64) float64 { return x }
	if opt.SignedLog {
		tf, inv = signedLog, signedExp
	}
	tlo, thi := tf(lo), tf(hi)
	width := (thi - tlo) / float64(bins)

	p := plot.New()
	p.Title.Text = opt.Title
	p.X.Label.Text = opt.XLabel
	p.Y.Label.Text = "fraction of the group's records per bin"
	p.Legend.Top = true
	p.Add(plotter.NewGrid())
	ymax := 0.0
	for gi, g := range groups {
		if len(g.Values) == 0 {
			continue
		}
		counts := make([]float64, bins)
		for _, v := range g.Values {
			b := int(math.Floor((tf(v) - tlo) / width))
			counts[min(max(b, 0), bins-1)]++
		}
		// A closed outline: from the baseline up each bin and back down.
		pts := make(plotter.XYs, 0, 2*bins+2)
		pts = append(pts, plotter.XY{X: tlo, Y: 0})
		for b, c := range counts {
			f := c / float64(len(g.Values))
			ymax = math.Max(ymax, f)
			x0 := tlo + float64(b)*width
			pts = append(pts, plotter.XY{X: x0, Y: f}, plotter.XY{X: x0 + width, Y: f})
		}
		pts = append(pts, plotter.XY{X: thi, Y: 0})
		l, err := plotter.NewLine(pts)
		if err != nil {
			return fmt.Errorf("plots.Histograms: group %q: %w", g.Name, err)
		}
		c := g.Color
		if c == nil {
			c = plotutil.Color(gi)
		}
		l.Color = c
		l.Width = vg.Points(1.5)
		r, gg, b, _ := c.RGBA()
		l.FillColor = color.NRGBA{R: uint8(r >> 8), G: uint8(gg >> 8), B: uint8(b >> 8), A: 50}
		p.Add(l)
		p.Legend.Add(fmt.Sprintf("%s (n=%d)", g.Name, len(g.Values)), l)
	}
	for mi, m := range opt.Markers {
		l, err := plotter.NewLine(plotter.XYs{{X: tf(m.X), Y: 0}, {X: tf(m.X), Y: ymax * 1.05}})
		if err != nil {
			return fmt.Errorf("plots.Histograms: marker %q: %w", m.Name, err)
		}
		l.Color = color.Black
		l.Width = vg.Points(1.5)
		l.Dashes = plotutil.Dashes(1 + mi)
		p.Add(l)
		p.Legend.Add(m.Name, l)
	}
	// The points are drawn in transformed coordinates on a linear axis
	// (gonum/plot places the axis label by the data midpoint, which a
	// non-linear axis Scale would put off centre), and the ticks carry
	// the original values.
	p.X.Min, p.X.Max = tlo, thi
	if opt.SignedLog {
		p.X.Tick.Marker = plot.TickerFunc(func(min, max float64) []plot.Tick {
			ticks := signedLogTicks(inv(min), inv(max))
			for i := range ticks {
				ticks[i].Value = tf(ticks[i].Value)
			}
			return ticks
		})
	}
	p.Y.Min, p.Y.Max = 0, ymax*1.4 // headroom for the legend
	return save(p, path, opt.Width, opt.Height, 9*vg.Inch, 5.5*vg.Inch)
}

// Curve is one named line through the points (X[i], Y[i]).
type Curve struct {
	Name  string
	X, Y  []float64
	Color color.Color // nil picks one from gonum/plot's palette
}

// CurveOptions configures Curves.
type CurveOptions struct {
	Title, XLabel, YLabel string
	// Diagonal adds the dashed line y = x labelled DiagonalName (for
	// example "chance").
	Diagonal     bool
	DiagonalName string
	// Unit fixes both axes to [0, 1].
	Unit bool
	// Width and Height of the image; zero means 6.5 by 6 inches.
	Width, Height vg.Length
	// LegendLeft puts the legend at the bottom right when false (the
	// place an ROC plot leaves empty) and at the top left when true.
	LegendLeft bool
	// Points are single points drawn over the curves, for example the
	// operating point of a threshold on an ROC curve. A named point gets a
	// legend entry with its shape in black, so that one name can stand for
	// points of several colours (give the others no name).
	Points []Point
}

// Point is one named point drawn as a marker; Shape picks the glyph from
// gonum/plot's list (plotutil.Shape).
type Point struct {
	Name  string
	X, Y  float64
	Color color.Color // nil means black
	Shape int
}

// Curves draws the curves with a legend and writes the image to path.
func Curves(path string, curves []Curve, opt CurveOptions) error {
	if len(curves) == 0 {
		return errors.New("plots.Curves: no curves")
	}
	p := plot.New()
	p.Title.Text = opt.Title
	p.X.Label.Text = opt.XLabel
	p.Y.Label.Text = opt.YLabel
	p.Add(plotter.NewGrid())
	if opt.LegendLeft {
		p.Legend.Top, p.Legend.Left = true, true
	} else {
		p.Legend.Top, p.Legend.Left = false, false
	}
	p.Legend.XOffs = -vg.Points(8)
	p.Legend.YOffs = vg.Points(8)
	for i, c := range curves {
		if len(c.X) != len(c.Y) {
			return fmt.Errorf("plots.Curves: curve %q: %d x values and %d y values", c.Name, len(c.X), len(c.Y))
		}
		pts := make(plotter.XYs, len(c.X))
		for j := range c.X {
			pts[j] = plotter.XY{X: c.X[j], Y: c.Y[j]}
		}
		l, err := plotter.NewLine(pts)
		if err != nil {
			return fmt.Errorf("plots.Curves: curve %q: %w", c.Name, err)
		}
		l.Color = c.Color
		if l.Color == nil {
			l.Color = plotutil.Color(i)
		}
		l.Width = vg.Points(2)
		p.Add(l)
		p.Legend.Add(c.Name, l)
	}
	if opt.Diagonal {
		l, err := plotter.NewLine(plotter.XYs{{X: 0, Y: 0}, {X: 1, Y: 1}})
		if err != nil {
			return err
		}
		l.Color = color.Gray{Y: 100}
		l.Dashes = []vg.Length{vg.Points(4), vg.Points(4)}
		p.Add(l)
		if opt.DiagonalName != "" {
			p.Legend.Add(opt.DiagonalName, l)
		}
	}
	for _, pt := range opt.Points {
		sc, err := plotter.NewScatter(plotter.XYs{{X: pt.X, Y: pt.Y}})
		if err != nil {
			return fmt.Errorf("plots.Curves: point %q: %w", pt.Name, err)
		}
		sc.GlyphStyle.Color = pt.Color
		if sc.GlyphStyle.Color == nil {
			sc.GlyphStyle.Color = color.Black
		}
		sc.GlyphStyle.Shape = plotutil.Shape(pt.Shape)
		sc.GlyphStyle.Radius = vg.Points(4)
		p.Add(sc)
		if pt.Name != "" {
			key := *sc
			key.GlyphStyle.Color = color.Black
			p.Legend.Add(pt.Name, &key)
		}
	}
	if opt.Unit {
		p.X.Min, p.X.Max, p.Y.Min, p.Y.Max = 0, 1, 0, 1.005
	}
	return save(p, path, opt.Width, opt.Height, 6.5*vg.Inch, 6*vg.Inch)
}

func save(p *plot.Plot, path string, w, h, dw, dh vg.Length) error {
	if w <= 0 {
		w = dw
	}
	if h <= 0 {
		h = dh
	}
	if err := p.Save(w, h, path); err != nil {
		return fmt.Errorf("plots: %s: %w", path, err)
	}
	return nil
}

func signedLog(x float64) float64 {
	return math.Copysign(math.Log10(1+math.Abs(x)), x)
}

func signedExp(y float64) float64 {
	return math.Copysign(math.Pow(10, math.Abs(y))-1, y)
}

// signedLogTicks labels 0 and the powers of ten (and their negatives) in
// range, with unlabelled minor ticks at 2..9 times each power.
func signedLogTicks(min, max float64) []plot.Tick {
	var ticks []plot.Tick
	add := func(v float64, label bool) {
		if v < min || v > max {
			return
		}
		t := plot.Tick{Value: v}
		if label {
			t.Label = strconv.FormatFloat(v, 'g', -1, 64)
		}
		ticks = append(ticks, t)
	}
	add(0, true)
	for e := 0; e <= 12; e++ {
		p := math.Pow(10, float64(e))
		for m := 1; m <= 9; m++ {
			add(float64(m)*p, m == 1)
			add(-float64(m)*p, m == 1)
		}
	}
	return ticks
}
