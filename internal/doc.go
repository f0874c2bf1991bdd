// Package internal holds code shared by the SDK's own packages and commands
// that is not part of the public API: the MNIST locator and the benchmark
// command live below it.
package internal
