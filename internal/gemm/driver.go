package gemm

import (
	"sync"
	"unsafe"
)

// parMin is the smallest product (m·n·k multiply-adds) split across
// goroutines: below it, waking a second goroutine costs about as much as it
// saves.
const parMin = 1 << 20

// gemm computes C = alpha*op(A)*op(B) + beta*C with valid arguments.
func gemm[T float](kn *kernel[T], threads int, tA, tB bool, m, n, k int, alpha T, a []T, lda int, b []T, ldb int, beta T, c []T, ldc int) {
	if m == 0 || n == 0 {
		return
	}
	if alpha == 0 || k == 0 {
		// Reference BLAS semantics: A and B are not read.
		scale(m, n, beta, c, ldc)
		return
	}
	parts, byN := split(kn, threads, m, n, k)
	if parts <= 1 {
		serial(kn, tA, tB, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc)
		return
	}
	tiles, unit := (m+kn.mr-1)/kn.mr, kn.mr
	if byN {
		tiles, unit = (n+kn.nr-1)/kn.nr, kn.nr
	}
	var wg sync.WaitGroup
	run := func(t int) {
		lo, hi := t*tiles/parts*unit, (t+1)*tiles/parts*unit
		if byN {
			hi = min(hi, n)
			var bb []T // columns lo.. of op(B)
			if tB {
				bb = b[lo*ldb:]
			} else {
				bb = b[lo:]
			}
			serial(kn, tA, tB, m, hi-lo, k, alpha, a, lda, bb, ldb, beta, c[lo:], ldc)
			return
		}
		hi = min(hi, m)
		var aa []T // rows lo.. of op(A)
		if tA {
			aa = a[lo:]
		} else {
			aa = a[lo*lda:]
		}
		serial(kn, tA, tB, hi-lo, n, k, alpha, aa, lda, b, ldb, beta, c[lo*ldc:], ldc)
	}
	wg.Add(parts - 1)
	for t := 1; t < parts; t++ {
		go func() {
			defer wg.Done()
			run(t)
		}()
	}
	run(0)
	wg.Wait()
}

// split decides how many goroutines share a product and whether they split
// the columns (byN) or the rows of C. Parts are whole register tiles; the
// dimension whose largest part is smallest wins.
func split[T float](kn *kernel[T], threads, m, n, k int) (parts int, byN bool) {
	if threads <= 1 || m*n*k < parMin {
		return 1, false
	}
	tm, tn := (m+kn.mr-1)/kn.mr, (n+kn.nr-1)/kn.nr
	pm, pn := min(threads, tm), min(threads, tn)
	// Work of the largest part, in multiply-adds per unit of k.
	wm := (tm + pm - 1) / pm * kn.mr * n
	wn := (tn + pn - 1) / pn * kn.nr * m
	if wn < wm || (wn == wm && pn >= pm) {
		return pn, true
	}
	return pm, false
}

// scale sets C = beta*C; beta 0 writes zeros without reading C.
func scale[T float](m, n int, beta T, c []T, ldc int) {
	if beta == 1 {
		return
	}
	for i := range m {
		row := c[i*ldc : i*ldc+n]
		if beta == 0 {
			clear(row)
			continue
		}
		for j := range row {
			row[j] *= beta
		}
	}
}

// buffers are one goroutine's packing space, 64-byte aligned.
type buffers[T float] struct {
	a, b, tmp []T
}

func aligned[T float](n int) []T {
	var zero T
	size := int(unsafe.Sizeof(zero))
	s := make([]T, n+64/size)
	off := 0
	for uintptr(unsafe.Pointer(&s[off]))%64 != 0 {
		off++
	}
	return s[off : off+n : off+n]
}

func (kn *kernel[T]) get(na, nb int) *buffers[T] {
	buf, _ := kn.pool.Get().(*buffers[T])
	if buf == nil {
		buf = &buffers[T]{tmp: aligned[T](kn.mr * kn.nr)}
	}
	if len(buf.a) < na {
		buf.a = aligned[T](na)
	}
	if len(buf.b) < nb {
		buf.b = aligned[T](nb)
	}
	return buf
}

// blockOf returns the block size that splits total into the fewest blocks
// of at most max, as evenly as possible, rounded up to a multiple of unit.
func blockOf(total, max, unit int) int {
	nb := (total + max - 1) / max
	s := (total + nb - 1) / nb
	return (s + unit - 1) / unit * unit
}

// serial is the blocked product of Goto and van de Geijn 2008 on the calling
// goroutine: loops over column blocks of C (nc), the inner dimension (kc)
// and row blocks of C (mc) around a macrokernel over register tiles.
func serial[T float](kn *kernel[T], tA, tB bool, m, n, k int, alpha T, a []T, lda int, b []T, ldb int, beta T, c []T, ldc int) {
	mr, nr := kn.mr, kn.nr
	kc := min(blockOf(k, kn.kc, 1), k)
	mc := blockOf(m, kn.mc, mr)
	nc := blockOf(n, kn.nc, nr)
	// op(B) = B is read in place, not packed, when the kernel can mask its
	// edge columns and the rows of B fall in all 64 sets of a 4 KiB-period L1
	// cache (stride gcd with 4096 at most 64 bytes), so that a kc×nr strip
	// stays in L1 as a packed one would.
	var zero T
	direct := kn.tile != nil && !tB && gcd(ldb*int(unsafe.Sizeof(zero)), 4096) <= 64
	nb := nc * kc
	if direct {
		nb = 0
	}
	// The same for A, transposed or not: the kernel takes element (r, p) of
	// op(A) from r*ars + p*aps, which covers both layouts.
	directA := kn.tile != nil && gcd(lda*int(unsafe.Sizeof(zero)), 4096) <= 64
	na := mc * kc
	if directA {
		na = 0
	}
	buf := kn.get(na, nb)
	defer kn.pool.Put(buf)
	for jc := 0; jc < n; jc += nc {
		ncb := min(nc, n-jc)
		for pc := 0; pc < k; pc += kc {
			kcb := min(kc, k-pc)
			betaBlock := beta
			if pc > 0 {
				betaBlock = 1
			}
			bp, bStride := buf.b, 0
			if direct {
				bp, bStride = b[pc*ldb+jc:], ldb
			} else {
				packB(buf.b, b, ldb, tB, pc, jc, kcb, ncb, nr)
			}
			for ic := 0; ic < m; ic += mc {
				mcb := min(mc, m-ic)
				ap, ars, aps := buf.a, 0, 0
				switch {
				case directA && tA: // op(A)[i][p] = a[p*lda+i]
					ap, ars, aps = a[pc*lda+ic:], 1, lda
				case directA:
					ap, ars, aps = a[ic*lda+pc:], lda, 1
				default:
					packA(buf.a, a, lda, tA, ic, pc, mcb, kcb, mr)
				}
				macro(kn, mcb, ncb, kcb, buf, ap, ars, aps, bp, bStride, alpha, betaBlock, c[ic*ldc+jc:], ldc)
			}
		}
	}
}

// macro runs the microkernel over every register tile of one mc×nc block of
// C, column strip by column strip: one kc×nr strip of packed B stays in L1
// while the mr-row strips of packed A stream past it from L2. Edge tiles go
// through buf.tmp so the kernel always writes a full tile.
//
// ap is packed A (ars 0) or A itself, element (r, p) of op(A) at r*ars +
// p*aps; bp is packed B (bStride 0) or B itself, its rows bStride elements
// apart.
func macro[T float](kn *kernel[T], mcb, ncb, kcb int, buf *buffers[T], ap []T, ars, aps int, bp []T, bStride int, alpha, beta T, c []T, ldc int) {
	mr, nr := kn.mr, kn.nr
	tmp := buf.tmp
	for jr := 0; jr < ncb; jr += nr {
		cols := min(nr, ncb-jr)
		var pb *T
		ldb := nr
		if bStride > 0 {
			pb, ldb = &bp[jr], bStride // B itself
		} else {
			pb = &bp[jr*kcb] // packed: strips of kcb×nr
		}
		// With A read in place and a kernel for every row count, the rows
		// are cut into tiles of nearly equal height (50 rows: five of 10,
		// not four of 12 and one of 2, whose 2-row tile does a sixth of the
		// work per load of B). Each element of C still sums over p in the
		// same order, so the result does not change.
		tiles, rowsLeft := (mcb+mr-1)/mr, mcb
		if kn.tile == nil || ars == 0 {
			tiles = 0 // packed A comes in strips of mr rows
		}
		for ir := 0; ir < mcb; {
			rows := min(mr, mcb-ir)
			if tiles > 0 {
				rows = (rowsLeft + tiles - 1) / tiles
				tiles--
				rowsLeft -= rows
			}
			var pa *T
			rs, ps := 1, mr
			if ars > 0 {
				pa, rs, ps = &ap[ir*ars], ars, aps // A itself
			} else {
				pa = &ap[ir*kcb] // packed: strips of mr×kcb
			}
			if kn.tile != nil {
				kn.tile(kcb, pa, pb, &c[ir*ldc+jr], ldc, alpha, beta, rows, cols, ldb, rs, ps)
				ir += rows
				continue
			}
			if rows == mr && cols == nr {
				kn.micro(kcb, pa, pb, &c[ir*ldc+jr], ldc, alpha, beta)
				ir += rows
				continue
			}
			kn.micro(kcb, pa, pb, &tmp[0], nr, alpha, 0)
			for i := range rows {
				dst := c[(ir+i)*ldc+jr : (ir+i)*ldc+jr+cols]
				src := tmp[i*nr : i*nr+cols]
				if beta == 0 {
					copy(dst, src)
					continue
				}
				for j, v := range src {
					dst[j] = v + beta*dst[j]
				}
			}
			ir += rows
		}
	}
}

// packA copies rows ic..ic+mcb and columns pc..pc+kcb of op(A) into strips
// of mr rows: strip s holds, for each p, the mr values op(A)[ic+s*mr+r][pc+p]
// at dst[s*mr*kcb + p*mr + r]. Rows past mcb are zero.
func packA[T float](dst, a []T, lda int, tA bool, ic, pc, mcb, kcb, mr int) {
	for s := 0; s*mr < mcb; s++ {
		strip := dst[s*mr*kcb : (s+1)*mr*kcb]
		rows := min(mr, mcb-s*mr)
		i0 := ic + s*mr
		if tA { // op(A)[i][p] = a[p*lda+i]: mr contiguous values per p
			for p := range kcb {
				src := a[(pc+p)*lda+i0 : (pc+p)*lda+i0+rows]
				d := strip[p*mr : p*mr+mr]
				copy(d, src)
				clear(d[rows:])
			}
			continue
		}
		// op(A)[i][p] = a[i*lda+p]: rows of A, four at a time, become
		// columns of the strip.
		r := 0
		for ; r+4 <= rows; r += 4 {
			s0 := a[(i0+r)*lda+pc : (i0+r)*lda+pc+kcb]
			s1 := a[(i0+r+1)*lda+pc : (i0+r+1)*lda+pc+kcb]
			s2 := a[(i0+r+2)*lda+pc : (i0+r+2)*lda+pc+kcb]
			s3 := a[(i0+r+3)*lda+pc : (i0+r+3)*lda+pc+kcb]
			for p := range s0 {
				d := strip[p*mr+r : p*mr+r+4 : p*mr+r+4]
				d[0], d[1], d[2], d[3] = s0[p], s1[p], s2[p], s3[p]
			}
		}
		for ; r < rows; r++ {
			src := a[(i0+r)*lda+pc : (i0+r)*lda+pc+kcb]
			for p, v := range src {
				strip[p*mr+r] = v
			}
		}
		for r := rows; r < mr; r++ {
			for p := range kcb {
				strip[p*mr+r] = 0
			}
		}
	}
}

// packB copies rows pc..pc+kcb and columns jc..jc+ncb of op(B) into strips
// of nr columns: strip s holds, for each p, the nr values
// op(B)[pc+p][jc+s*nr+j] at dst[s*nr*kcb + p*nr + j]. Columns past ncb are
// zero.
func packB[T float](dst, b []T, ldb int, tB bool, pc, jc, kcb, ncb, nr int) {
	if !tB {
		// op(B)[p][j] = b[p*ldb+j]: each row of B is cut into strips.
		full := ncb / nr
		for p := range kcb {
			row := b[(pc+p)*ldb+jc : (pc+p)*ldb+jc+ncb]
			for s := range full {
				o := s*nr*kcb + p*nr
				copy(dst[o:o+nr:o+nr], row[s*nr:s*nr+nr])
			}
			if cols := ncb - full*nr; cols > 0 {
				o := full*nr*kcb + p*nr
				d := dst[o : o+nr : o+nr]
				copy(d, row[full*nr:])
				clear(d[cols:])
			}
		}
		return
	}
	for s := 0; s*nr < ncb; s++ {
		strip := dst[s*nr*kcb : (s+1)*nr*kcb]
		cols := min(nr, ncb-s*nr)
		j0 := jc + s*nr
		// op(B)[p][j] = b[j*ldb+p]: rows of B, four at a time, become
		// columns of the strip.
		j := 0
		for ; j+8 <= cols; j += 8 {
			s0 := b[(j0+j)*ldb+pc : (j0+j)*ldb+pc+kcb]
			s1 := b[(j0+j+1)*ldb+pc:][:len(s0)]
			s2 := b[(j0+j+2)*ldb+pc:][:len(s0)]
			s3 := b[(j0+j+3)*ldb+pc:][:len(s0)]
			s4 := b[(j0+j+4)*ldb+pc:][:len(s0)]
			s5 := b[(j0+j+5)*ldb+pc:][:len(s0)]
			s6 := b[(j0+j+6)*ldb+pc:][:len(s0)]
			s7 := b[(j0+j+7)*ldb+pc:][:len(s0)]
			for p := range s0 {
				d := strip[p*nr+j:][:8:8]
				d[0], d[1], d[2], d[3] = s0[p], s1[p], s2[p], s3[p]
				d[4], d[5], d[6], d[7] = s4[p], s5[p], s6[p], s7[p]
			}
		}
		for ; j+4 <= cols; j += 4 {
			s0 := b[(j0+j)*ldb+pc : (j0+j)*ldb+pc+kcb]
			s1 := b[(j0+j+1)*ldb+pc:][:len(s0)]
			s2 := b[(j0+j+2)*ldb+pc:][:len(s0)]
			s3 := b[(j0+j+3)*ldb+pc:][:len(s0)]
			for p := range s0 {
				d := strip[p*nr+j:][:4:4]
				d[0], d[1], d[2], d[3] = s0[p], s1[p], s2[p], s3[p]
			}
		}
		for ; j < cols; j++ {
			src := b[(j0+j)*ldb+pc : (j0+j)*ldb+pc+kcb]
			for p, v := range src {
				strip[p*nr+j] = v
			}
		}
		for j := cols; j < nr; j++ {
			for p := range kcb {
				strip[p*nr+j] = 0
			}
		}
	}
}

func gcd(a, b int) int {
	for b != 0 {
		a, b = b, a%b
	}
	return a
}
