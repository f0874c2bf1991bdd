// Package errs is the SDK's one home for the sentinel errors that more than
// one package returns. It imports nothing but the standard library, so the
// data-only packages (vae/dataset, vae/schedule, internal/safetensors) carry
// no graph dependency for the sake of an error value.
//
// Users never import this package: every public package re-exports the
// sentinels it returns under its own name (layers.ErrInvalidArgument,
// dataset.ErrInvalidArgument, schedule.ErrInvalidArgument,
// vae.ErrInvalidArgument), and those names all hold the same value, so
// errors.Is gives the same answer whichever name a caller uses.
package errs

import (
	"errors"
	"fmt"
)

// InvalidArgument is wrapped by every error that reports a bad argument or
// configuration field: a size of zero, a mismatched shape, NaN where a
// number is needed. The message names the function (or type) and the
// argument.
var InvalidArgument = errors.New("invalid argument")

// Arg returns an error wrapping InvalidArgument that names where (the
// function, type or layer) and which argument is wrong.
func Arg(where, arg, format string, a ...any) error {
	return fmt.Errorf("%s: %s: %s: %w", where, arg, fmt.Sprintf(format, a...), InvalidArgument)
}
