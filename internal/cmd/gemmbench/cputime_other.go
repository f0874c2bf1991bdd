//go:build !unix

package main

import "time"

// cpuTime is not measured here; the cpu column then reads 0.
func cpuTime() time.Duration { return 0 }
