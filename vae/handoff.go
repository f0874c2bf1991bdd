package vae

import (
	"runtime"
	"sync/atomic"
	"time"
)

// A handoff runs posted work on one helper goroutine with little delay.
// Training steps post several short pieces of work each (one per phase of
// a step, about a millisecond or less apiece); handing them over on a
// channel costs the time to wake a sleeping thread each time, which was
// measured at up to a tenth of a millisecond on these machines. So the
// helper spins for a short while after each piece, waiting for the next,
// before it sleeps, and post wakes it only when it sleeps; wait spins
// likewise. The spin is bounded (spinFor), so an idle trainer holds a
// core for at most that long.
type handoff struct {
	fn       func(arg int) // run by the helper for each post
	arg      int
	posted   atomic.Uint64 // number of posts
	finished atomic.Uint64 // number of posts the helper has finished
	sleeping atomic.Bool
	wake     chan struct{} // capacity 1
	stop     atomic.Bool
	exited   chan struct{}
}

// spinFor is how long the helper and the waiter spin before they sleep or
// yield.
const spinFor = 200 * time.Microsecond

func newHandoff(fn func(arg int)) *handoff {
	h := &handoff{fn: fn, wake: make(chan struct{}, 1), exited: make(chan struct{})}
	go h.loop()
	return h
}

func (h *handoff) loop() {
	defer close(h.exited)
	var seen uint64
	for {
		start := time.Now()
		for spins := 0; h.posted.Load() == seen; spins++ {
			if spins&63 != 63 || time.Since(start) < spinFor {
				continue
			}
			// Sleep. Storing sleeping before reading posted again, with
			// post storing posted before reading sleeping, means that
			// either this read sees the post or post sees the sleeper
			// and wakes it (a stale token only costs one more loop).
			h.sleeping.Store(true)
			if h.posted.Load() == seen {
				<-h.wake
			}
			h.sleeping.Store(false)
			start = time.Now()
		}
		seen = h.posted.Load()
		if h.stop.Load() {
			return
		}
		h.fn(h.arg)
		h.finished.Store(seen)
	}
}

// post hands arg to the helper; the caller must wait before posting again.
func (h *handoff) post(arg int) {
	h.arg = arg
	h.posted.Add(1)
	if h.sleeping.Load() {
		select {
		case h.wake <- struct{}{}:
		default:
		}
	}
}

// wait returns when the helper has finished the last post.
func (h *handoff) wait() {
	want := h.posted.Load()
	start := time.Now()
	for spins := 0; h.finished.Load() != want; spins++ {
		if spins&63 == 63 && time.Since(start) > spinFor {
			runtime.Gosched()
		}
	}
}

// close stops the helper and waits for it to exit.
func (h *handoff) close() {
	h.stop.Store(true)
	h.posted.Add(1)
	select {
	case h.wake <- struct{}{}:
	default:
	}
	<-h.exited
}
