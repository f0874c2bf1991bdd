package safetensors

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/bits"
)

// Dtypes of the format. Data of any of them can be stored and read as raw
// bytes; F32, F64, I32 and I64 have typed helpers.
const (
	BOOL    = "BOOL"
	U8      = "U8"
	I8      = "I8"
	F8E5M2  = "F8_E5M2"
	F8E4M3  = "F8_E4M3"
	I16     = "I16"
	U16     = "U16"
	F16     = "F16"
	BF16    = "BF16"
	I32     = "I32"
	U32     = "U32"
	F32     = "F32"
	F64     = "F64"
	I64     = "I64"
	U64     = "U64"
	metaKey = "__metadata__"
)

// DtypeSize returns the size in bytes of one element of dtype, and false for
// a dtype this package does not know.
func DtypeSize(dtype string) (int, bool) {
	switch dtype {
	case BOOL, U8, I8, F8E5M2, F8E4M3:
		return 1, true
	case I16, U16, F16, BF16:
		return 2, true
	case I32, U32, F32:
		return 4, true
	case I64, U64, F64:
		return 8, true
	}
	return 0, false
}

// ErrInvalidArgument is wrapped by errors that report a bad argument to this
// package (a tensor whose data does not match its shape, a duplicate name).
var ErrInvalidArgument = errors.New("invalid argument")

func argError(where, arg, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %s: %w", where, arg, fmt.Sprintf(format, a...), ErrInvalidArgument)
}

// Tensor is one named tensor: its dtype (one of the dtype constants), its
// shape (row-major; an empty shape is a scalar) and its data, little-endian,
// len(Data) == product(Shape) * DtypeSize(Dtype).
type Tensor struct {
	Name  string
	Dtype string
	Shape []int
	Data  []byte
}

// elements returns the product of shape, or an error for a negative
// dimension or an overflow.
func elements(shape []int) (int, error) {
	n := uint64(1)
	for i, d := range shape {
		if d < 0 {
			return 0, fmt.Errorf("negative dimension %d at shape index %d", d, i)
		}
		hi, lo := bits.Mul64(n, uint64(d))
		if hi != 0 || lo > math.MaxInt {
			return 0, fmt.Errorf("shape %v overflows", shape)
		}
		n = lo
	}
	return int(n), nil
}

// byteSize returns product(shape) * size of dtype, checking every step.
func byteSize(dtype string, shape []int) (int, error) {
	size, ok := DtypeSize(dtype)
	if !ok {
		return 0, fmt.Errorf("unknown dtype %q", dtype)
	}
	n, err := elements(shape)
	if err != nil {
		return 0, err
	}
	hi, lo := bits.Mul64(uint64(n), uint64(size))
	if hi != 0 || lo > math.MaxInt {
		return 0, fmt.Errorf("shape %v of %s overflows", shape, dtype)
	}
	return int(lo), nil
}

// Validate checks that t's dtype is known, its shape has no negative
// dimension and its data has exactly the bytes the shape needs.
func (t Tensor) Validate() error {
	const where = "safetensors.Tensor.Validate"
	want, err := byteSize(t.Dtype, t.Shape)
	if err != nil {
		return argError(where, "tensor "+quote(t.Name), "%v", err)
	}
	if len(t.Data) != want {
		return argError(where, "tensor "+quote(t.Name), "%d data bytes, shape %v of %s needs %d", len(t.Data), t.Shape, t.Dtype, want)
	}
	return nil
}

// NumElements returns the product of the shape (1 for a scalar), or 0 if the
// shape is invalid.
func (t Tensor) NumElements() int {
	n, err := elements(t.Shape)
	if err != nil {
		return 0
	}
	return n
}

func quote(s string) string { return fmt.Sprintf("%q", s) }

func fromValues[T any](where, name, dtype string, size int, shape []int, v []T, put func([]byte, T)) (Tensor, error) {
	n, err := elements(shape)
	if err != nil {
		return Tensor{}, argError(where, "shape", "%v", err)
	}
	if n != len(v) {
		return Tensor{}, argError(where, "data", "%d values, shape %v has %d elements", len(v), shape, n)
	}
	data := make([]byte, size*n)
	for i, x := range v {
		put(data[i*size:], x)
	}
	return Tensor{Name: name, Dtype: dtype, Shape: append([]int{}, shape...), Data: data}, nil
}

// FromFloat32 returns an F32 tensor holding a copy of v. The bits of every
// value are kept exactly (NaN payloads, -0). len(v) must equal the product
// of shape.
func FromFloat32(name string, shape []int, v []float32) (Tensor, error) {
	return fromValues("safetensors.FromFloat32", name, F32, 4, shape, v, func(b []byte, x float32) {
		binary.LittleEndian.PutUint32(b, math.Float32bits(x))
	})
}

// FromFloat64 returns an F64 tensor holding a copy of v; see FromFloat32.
func FromFloat64(name string, shape []int, v []float64) (Tensor, error) {
	return fromValues("safetensors.FromFloat64", name, F64, 8, shape, v, func(b []byte, x float64) {
		binary.LittleEndian.PutUint64(b, math.Float64bits(x))
	})
}

// FromInt32 returns an I32 tensor holding a copy of v; see FromFloat32.
func FromInt32(name string, shape []int, v []int32) (Tensor, error) {
	return fromValues("safetensors.FromInt32", name, I32, 4, shape, v, func(b []byte, x int32) {
		binary.LittleEndian.PutUint32(b, uint32(x))
	})
}

// FromInt64 returns an I64 tensor holding a copy of v; see FromFloat32.
func FromInt64(name string, shape []int, v []int64) (Tensor, error) {
	return fromValues("safetensors.FromInt64", name, I64, 8, shape, v, func(b []byte, x int64) {
		binary.LittleEndian.PutUint64(b, uint64(x))
	})
}

func values[T any](where string, t Tensor, dtype string, size int, get func([]byte) T) ([]T, error) {
	if t.Dtype != dtype {
		return nil, argError(where, "tensor "+quote(t.Name), "dtype is %s, not %s", t.Dtype, dtype)
	}
	if err := t.Validate(); err != nil {
		return nil, fmt.Errorf("%s: %w", where, err)
	}
	out := make([]T, len(t.Data)/size)
	for i := range out {
		out[i] = get(t.Data[i*size:])
	}
	return out, nil
}

// Float32s decodes an F32 tensor's data into a new slice, bit for bit. Any
// other dtype, or data that does not match the shape, is an error.
func (t Tensor) Float32s() ([]float32, error) {
	return values("safetensors.Tensor.Float32s", t, F32, 4, func(b []byte) float32 {
		return math.Float32frombits(binary.LittleEndian.Uint32(b))
	})
}

// Float64s decodes an F64 tensor's data into a new slice; see Float32s.
func (t Tensor) Float64s() ([]float64, error) {
	return values("safetensors.Tensor.Float64s", t, F64, 8, func(b []byte) float64 {
		return math.Float64frombits(binary.LittleEndian.Uint64(b))
	})
}

// Int32s decodes an I32 tensor's data into a new slice; see Float32s.
func (t Tensor) Int32s() ([]int32, error) {
	return values("safetensors.Tensor.Int32s", t, I32, 4, func(b []byte) int32 {
		return int32(binary.LittleEndian.Uint32(b))
	})
}

// Int64s decodes an I64 tensor's data into a new slice; see Float32s.
func (t Tensor) Int64s() ([]int64, error) {
	return values("safetensors.Tensor.Int64s", t, I64, 8, func(b []byte) int64 {
		return int64(binary.LittleEndian.Uint64(b))
	})
}
