// Package safetensors reads and writes the safetensors file format, the
// SDK's checkpoint container. It is an independent implementation of the
// open format description:
//
//	bytes 0..7      N, the header length, unsigned 64-bit little-endian
//	bytes 8..8+N    the header: a UTF-8 JSON object
//	bytes 8+N..     the byte buffer holding every tensor's data
//
// The header maps each tensor name to
//
//	{"dtype": "F32", "shape": [2, 3], "data_offsets": [begin, end]}
//
// where begin and end (one past the last byte) are relative to the start of
// the byte buffer, plus an optional "__metadata__" object whose values are
// all strings. Tensor data are little-endian and row-major; shape [] is a
// scalar and a zero dimension gives an empty tensor.
//
// # Writing
//
// Write and WriteFile produce deterministic bytes: tensors are laid out in
// name order, the header JSON has sorted keys, and it is padded with spaces
// so the byte buffer starts at a multiple of 8. WriteFile is atomic: it
// writes a temporary file in the target's directory, syncs and closes it,
// renames it over the target and syncs the directory. If anything fails
// before the rename, the old file is untouched and the temporary file is
// removed. A process killed mid-save leaves its temporary file behind; the
// next WriteFile of the same target removes it (see WriteFile for how a
// stale file is told from one a live save is writing).
//
// Typed helpers build tensors from and decode them to Go slices, bit for bit
// (NaN payloads and -0 survive): FromFloat32, FromFloat64, FromInt32,
// FromInt64 and Tensor.Float32s, Float64s, Int32s, Int64s. Other dtypes of
// the format (BOOL, U8, I8, F8_E5M2, F8_E4M3, I16, U16, F16, BF16, U32, U64)
// are carried as raw bytes.
//
// # Reading
//
// Read, ReadBytes, ReadFile and ReadStream validate the whole file before returning it
// and never panic, whatever the input. Every problem is an error that names
// the file and a byte offset (or the tensor) and wraps ErrCorrupt; a file
// that ends too early wraps ErrTruncated, which itself wraps ErrCorrupt.
// The checks:
//
//   - the file holds at least the 8-byte length, and the header length is at
//     most MaxHeaderSize and fits in the file;
//   - the header is valid UTF-8 and one JSON object, starting with '{' and
//     followed only by space padding; keys are not duplicated;
//   - each entry has exactly the fields dtype, shape and data_offsets; the
//     dtype is known, no dimension is negative, and end - begin equals the
//     product of the shape times the dtype's size;
//   - "__metadata__", if present, maps strings to strings;
//   - the tensors' byte ranges lie inside the buffer and cover it exactly:
//     no overlap, no hole, no trailing bytes.
//
// ReadStream reads from an io.Reader under a caller's size limit, and its
// memory grows with the bytes that arrive, never with what a header claims.
//
// File.Tensors maps names to tensors; File.Tensor looks one up with an error
// wrapping ErrNotFound, and File.List returns them in name order.
package safetensors
