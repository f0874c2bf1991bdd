// Package vae composes layers, a likelihood and a prior into a variational
// autoencoder, and trains, evaluates, checkpoints and serves it.
package vae
