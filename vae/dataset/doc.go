// Package dataset holds training data in memory and cuts it into
// minibatches. It reads the IDX format (MNIST and friends) and CSV, and
// offers a per-feature standardizer whose parameters can be stored as JSON.
//
// # Sets
//
// A Set is N records of F float64 features, row-major, with optional
// integer class labels (0..Classes-1) and an optional per-record shape,
// such as [1, 28, 28] for one-channel images (the default shape is [F]).
// Build one with New, FromRows or FromMatrix (a gonum mat.Matrix), then add
// labels with WithLabels and a shape with WithShape. Sets never change:
// WithLabels, WithShape, Subset, Split, Binarize and Scale return new Sets,
// so one Set can be shared by many goroutines.
//
// Every value must be finite; a NaN or infinity is rejected with an error
// naming the record and feature (0-based).
//
// The trainer copies a minibatch into the backing slice of a reusable
// tensor with Fill (a []float32 or []float64), and conditional models get
// one-hot labels with FillOneHot.
//
// # Minibatches
//
// Batches(n, size, rng) returns the index slices of one epoch. With a
// *rand.Rand from math/rand/v2 the order is shuffled, and the same seed
// gives the same order; with a nil rng the indices stay in order. Every
// index appears exactly once and the last batch is smaller when size does
// not divide n. Keep one generator for a run so each epoch is reshuffled:
//
//	rng := rand.New(rand.NewPCG(seed, 0))
//	for epoch := range epochs {
//		batches, _ := dataset.Batches(train.Len(), 128, rng)
//		for _, idx := range batches {
//			_ = train.Fill(buf[:len(idx)*train.Features()], idx)
//			// ... run one step on len(idx) records
//		}
//	}
//
// Split(frac, seed) divides a Set at random into two, for example a
// training and a validation part.
//
// # IDX files
//
// ReadIDX reads any IDX file: two zero bytes, a type code (0x08 unsigned
// byte, 0x09 signed byte, 0x0B int16, 0x0C int32, 0x0D float32, 0x0E
// float64), the number of dimensions, each dimension as a big-endian
// uint32, then the big-endian elements. A stream starting with the gzip
// magic bytes is decompressed on the fly. ReadIDXImages and ReadIDXLabels
// turn such files into a Set and a label slice, and LoadIDX reads a pair of
// files by path into one labelled Set (a file of dimensions (N, rows, cols)
// gives records of shape [1, rows, cols]). IDXOptions scales the values
// (Scale: 1.0/255 maps bytes to [0, 1]), binarizes them, checks labels
// against a class count and can stop after the first Limit records.
// Errors give the file and the byte offset into the decompressed stream:
// a bad magic at offset 0, an unknown type at offset 2, the offset where
// truncated data ends, the offset of an out-of-range label, the offset of
// a dimension that makes the product of the non-zero dimensions exceed
// 2^40.
//
// Memory follows the data that arrives, never the header's claim: reading
// an IDX stream allocates at most 12 times the size of the element data the
// (decompressed) stream actually holds, plus 256 KiB of buffers; labels add
// 8 bytes per label. A 12-byte header claiming billions of elements costs
// the buffers only. (The raw bytes are read into a buffer that doubles as
// they arrive, at most 4 bytes per byte; a complete read is then decoded
// into float64 values, 8 bytes per element, which for one-byte elements is
// the other 8.)
//
// # Labels
//
// Class labels lie in [0, MaxClasses) (MaxClasses = 65536), so the class
// count of a Set, and the width of a one-hot row, is at most MaxClasses. A
// larger label is an error naming the file and the line and column (CSV),
// the record and byte offset (IDX) or the record (WithLabels); a larger
// class count in an option or argument is a bad argument.
//
// # CSV files
//
// ReadCSV reads a CSV file whose first row names the columns. CSVOptions
// picks the label column (an integer class), the feature columns to keep or
// to ignore, and the separator. A bad row (wrong width, an empty or
// non-numeric value, NaN, infinity) is reported with the file, the line as
// numbered in the file (the header is line 1) and the column's 1-based
// position and name. Reading n bytes of CSV allocates at most 256*n bytes
// plus 64 KiB (rows of numbers about 20*n).
//
// # Mixed columns and missing values
//
// A Schema (JSON-ready; ReadSchema reads one strictly) names each column
// and its kind: real, positive, count, binary or categorical (with its
// category strings). ReadCSV with CSVOptions.Schema reads exactly the
// schema's columns, maps category strings to their index and checks every
// value against its kind (errors name line and column).
//
// Missing values are an opt-in. By default a NaN is an error naming the
// record and feature. NewMissing, Set.WithMissing and CSVOptions.Missing
// (an empty cell, NaN or NA means missing) make a Set whose missing
// entries are NaN: Missing counts them, Observed and FillMask give the
// observation mask, Subset and Split keep them, and FitStandardizer
// averages over the observed entries only (FitStandardizerSchema leaves
// non-real columns unscaled).
//
// Records stay in the raw-record layout, one value per schema column (a
// category as its index, a missing entry as NaN); the model-input layout
// (one-hot categories, zero-filled values and the mask) is built by the
// model from it.
//
// # Standardizing
//
// FitStandardizer computes each feature's mean and population standard
// deviation (dividing by N); a constant feature gets a standard deviation
// of 1 so it is only centred. Standardizer.Apply and Invert map whole Sets,
// ApplySlice and InvertSlice map float32 or float64 batches in place. Its
// fields are exported so it can be saved in checkpoint metadata as JSON.
//
// # Errors
//
// Bad arguments wrap ErrInvalidArgument and name the function and the
// argument; bad data wraps ErrInvalidData and names the file and the row
// and column or the byte offset. Nothing in this package panics on bad
// input.
package dataset
