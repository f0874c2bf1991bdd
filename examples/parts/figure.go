package main

import (
	"fmt"
	"image"
	"image/color"
	"image/draw"
	"image/png"
	"os"
	"path/filepath"

	"golang.org/x/image/font"
	"golang.org/x/image/font/basicfont"
	"golang.org/x/image/math/fixed"
)

// Figures are drawn on white paper: a pixel of intensity v (1 = part, 0 =
// empty) is painted with grey level 255*(1-v), so parts are dark
// silhouettes. Cells get a thin light frame so that empty ones still show.

var (
	paper = color.Gray{Y: 255}
	frame = color.Gray{Y: 205}
	ink   = color.Gray{Y: 0}
)

// glyph metrics of basicfont.Face7x13, in pixels at scale 1
const (
	glyphAdvance = 7
	glyphHeight  = 13
)

// textWidth returns the width in pixels of s drawn at the given scale.
func textWidth(s string, scale int) int { return len(s) * glyphAdvance * scale }

// textHeight returns the height in pixels of a line drawn at the given scale.
func textHeight(scale int) int { return glyphHeight * scale }

// figure is a greyscale picture under construction.
type figure struct {
	img *image.Gray
}

func newFigure(w, h int) *figure {
	img := image.NewGray(image.Rect(0, 0, w, h))
	draw.Draw(img, img.Bounds(), image.NewUniform(paper), image.Point{}, draw.Src)
	return &figure{img: img}
}

// cell paints a Side x Side image v (row-major, values in [0, 1], clamped)
// with its top-left corner at (x0, y0), every pixel scale x scale, and a
// one-pixel frame just outside it.
func (f *figure) cell(x0, y0 int, v []float64, scale int) {
	w := Side * scale
	for i := -1; i <= w; i++ {
		f.img.SetGray(x0+i, y0-1, frame)
		f.img.SetGray(x0+i, y0+w, frame)
		f.img.SetGray(x0-1, y0+i, frame)
		f.img.SetGray(x0+w, y0+i, frame)
	}
	for py := 0; py < Side; py++ {
		for px := 0; px < Side; px++ {
			c := v[py*Side+px]
			c = max(0, min(1, c))
			g := color.Gray{Y: uint8(255*(1-c) + 0.5)}
			for dy := 0; dy < scale; dy++ {
				for dx := 0; dx < scale; dx++ {
					f.img.SetGray(x0+px*scale+dx, y0+py*scale+dy, g)
				}
			}
		}
	}
}

// text writes s in basicfont's 7x13 face magnified scale times (nearest
// neighbour), with the top-left corner of its line box at (x0, y0).
func (f *figure) text(x0, y0 int, s string, scale int) {
	w, h := textWidth(s, 1), textHeight(1)
	if w == 0 {
		return
	}
	mask := image.NewAlpha(image.Rect(0, 0, w, h))
	d := font.Drawer{Dst: mask, Src: image.Opaque, Face: basicfont.Face7x13,
		Dot: fixed.P(0, basicfont.Face7x13.Ascent)}
	d.DrawString(s)
	for y := 0; y < h; y++ {
		for x := 0; x < w; x++ {
			a := mask.AlphaAt(x, y).A
			if a == 0 {
				continue
			}
			for dy := 0; dy < scale; dy++ {
				for dx := 0; dx < scale; dx++ {
					f.img.SetGray(x0+x*scale+dx, y0+y*scale+dy, ink)
				}
			}
		}
	}
}

// save writes the figure as a PNG file, atomically: it writes a temporary
// file in the same directory and renames it over path.
func (f *figure) save(path string) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), ".parts-*.png")
	if err != nil {
		return fmt.Errorf("writing %s: %w", path, err)
	}
	defer os.Remove(tmp.Name()) // no-op after a successful rename
	if err := png.Encode(tmp, f.img); err != nil {
		tmp.Close()
		return fmt.Errorf("writing %s: %w", path, err)
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("writing %s: %w", path, err)
	}
	if err := os.Rename(tmp.Name(), path); err != nil {
		return fmt.Errorf("writing %s: %w", path, err)
	}
	return nil
}
