package vae

import (
	"math"

	"lowerbound.dev/layers"
)

// The steps of a plan. Each reads its parameters at call time through
// kernels.data and multiplies only through kernels.gemm.

// dense writes x W + b for rows rows of x (rows, in) into y (rows, out).
func dense[T float](k *kernels[T], wp, bp *layers.Param, x, y []T, rows, in, out int) {
	w, b := k.data(wp.Value), k.data(bp.Value)
	for r := 0; r < rows; r++ {
		copy(y[r*out:(r+1)*out], b[:out])
	}
	k.gemm(false, rows, out, in, x, in, w, out, y, out)
}

// denseOp is a Dense layer followed by an activation (Identity when none).
type denseOp[T float] struct {
	w, b    *layers.Param
	in, out int
	act     layers.Activation
}

func (d *denseOp[T]) width() int   { return d.out }
func (d *denseOp[T]) scratch() int { return 0 }
func (d *denseOp[T]) forward(k *kernels[T], in, out, _ []T, rows int) {
	dense(k, d.w, d.b, in, out, rows, d.in, d.out)
	activate(d.act, out[:rows*d.out])
}

// forwardFM is forward on transposed rows: in is (in, rows), out (out,
// rows), and out = W^T in + b.
func (d *denseOp[T]) forwardFM(k *kernels[T], in, out []T, rows int) {
	w, b := k.data(d.w.Value), k.data(d.b.Value)
	for j := 0; j < d.out; j++ {
		row := out[j*rows : (j+1)*rows]
		bj := b[j]
		for i := range row {
			row[i] = bj
		}
	}
	k.gemm(true, d.out, rows, d.in, w, d.out, in, rows, out, rows)
	activate(d.act, out[:rows*d.out])
}

// actOp is an activation on its own.
type actOp[T float] struct {
	act layers.Activation
	n   int
}

func (a *actOp[T]) width() int   { return a.n }
func (a *actOp[T]) scratch() int { return 0 }
func (a *actOp[T]) forward(_ *kernels[T], in, out, _ []T, rows int) {
	copy(out[:rows*a.n], in[:rows*a.n])
	activate(a.act, out[:rows*a.n])
}

// activate applies a in place, with the formulas of layers.Activation.
func activate[T float](a layers.Activation, v []T) {
	// The fused Dense op's kernels: one implementation of each activation
	// for the graphs and the lean path.
	switch v := any(v).(type) {
	case []float32:
		a.ApplyFloat32(v)
	case []float64:
		a.ApplyFloat64(v)
	}
}

func sigmoid(x float64) float64 {
	if x >= 0 {
		return 1 / (1 + math.Exp(-x))
	}
	e := math.Exp(x)
	return e / (1 + e)
}

// convOp is a Conv2D layer: for each record, the input patches are laid
// out as a (In*KH*KW, OH*OW) matrix (im2col) and multiplied by the
// (Out, In*KH*KW) weight.
type convOp[T float] struct {
	w, b          *layers.Param
	cfg           layers.Conv2DConfig
	h, wd, oh, ow int
	act           layers.Activation
}

func (c *convOp[T]) width() int { return c.cfg.Out * c.oh * c.ow }
func (c *convOp[T]) scratch() int {
	return c.cfg.In * c.cfg.Kernel[0] * c.cfg.Kernel[1] * c.oh * c.ow
}

func (c *convOp[T]) forward(k *kernels[T], in, out, tmp []T, rows int) {
	w, b := k.data(c.w.Value), k.data(c.b.Value)
	ci, co, kh, kw := c.cfg.In, c.cfg.Out, c.cfg.Kernel[0], c.cfg.Kernel[1]
	sh, sw, ph, pw := c.cfg.Stride[0], c.cfg.Stride[1], c.cfg.Padding[0], c.cfg.Padding[1]
	area := c.oh * c.ow
	ckk := ci * kh * kw
	col := tmp[:ckk*area]
	inW, outW := ci*c.h*c.wd, c.width()
	for r := 0; r < rows; r++ {
		x := in[r*inW : (r+1)*inW]
		for ch := 0; ch < ci; ch++ {
			for i := 0; i < kh; i++ {
				for j := 0; j < kw; j++ {
					dst := col[((ch*kh+i)*kw+j)*area:][:area]
					for oy := 0; oy < c.oh; oy++ {
						y := oy*sh - ph + i
						for ox := 0; ox < c.ow; ox++ {
							xx := ox*sw - pw + j
							var v T
							if y >= 0 && y < c.h && xx >= 0 && xx < c.wd {
								v = x[(ch*c.h+y)*c.wd+xx]
							}
							dst[oy*c.ow+ox] = v
						}
					}
				}
			}
		}
		y := out[r*outW : (r+1)*outW]
		for o := 0; o < co; o++ {
			bo := b[o]
			for i := range y[o*area : (o+1)*area] {
				y[o*area+i] = bo
			}
		}
		k.gemm(false, co, area, ckk, w, ckk, col, area, y, area)
	}
	activate(c.act, out[:rows*outW])
}

// upsampleOp repeats every pixel f times along both spatial axes.
type upsampleOp[T float] struct{ c, h, w, f int }

func (u *upsampleOp[T]) width() int   { return u.c * u.h * u.f * u.w * u.f }
func (u *upsampleOp[T]) scratch() int { return 0 }
func (u *upsampleOp[T]) forward(_ *kernels[T], in, out, _ []T, rows int) {
	inW, outW := u.c*u.h*u.w, u.width()
	oh, ow := u.h*u.f, u.w*u.f
	for r := 0; r < rows; r++ {
		x, y := in[r*inW:(r+1)*inW], out[r*outW:(r+1)*outW]
		for ch := 0; ch < u.c; ch++ {
			for oy := 0; oy < oh; oy++ {
				src := x[(ch*u.h+oy/u.f)*u.w:][:u.w]
				dst := y[(ch*oh+oy)*ow:][:ow]
				for ox := range dst {
					dst[ox] = src[ox/u.f]
				}
			}
		}
	}
}

// userOp runs a user layer through LeanLayer.
type userOp[T float] struct {
	l   LeanLayer
	out int
}

func (u *userOp[T]) width() int   { return u.out }
func (u *userOp[T]) scratch() int { return 0 }
func (u *userOp[T]) forward(k *kernels[T], in, out, _ []T, rows int) {
	k.forward(u.l, in, out[:rows*u.out], rows)
}
