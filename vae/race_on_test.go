//go:build race

package vae

const raceEnabled = true
