package uplink

import (
	"math/rand/v2"
	"time"
)

// Backoff is an exponential reconnect schedule with jitter: each wait is
// the current step times a random factor in 0.8..1.2, and the step grows by
// Factor up to Ceiling. The zero value uses Base 100 ms, Ceiling 5 s and
// Factor 1.6. Not safe for concurrent use.
type Backoff struct {
	Base    time.Duration // first step; 0 means 100 ms
	Ceiling time.Duration // largest step; 0 means 5 s
	Factor  float64       // growth per failure; 0 means 1.6
	step    time.Duration
}

// Next returns the wait before the next attempt and grows the step.
func (b *Backoff) Next() time.Duration {
	base, ceil, f := b.Base, b.Ceiling, b.Factor
	if base <= 0 {
		base = 100 * time.Millisecond
	}
	if ceil <= 0 {
		ceil = 5 * time.Second
	}
	if f <= 1 {
		f = 1.6
	}
	if b.step < base {
		b.step = base
	}
	w := time.Duration((0.8 + 0.4*rand.Float64()) * float64(b.step))
	b.step = min(ceil, time.Duration(float64(b.step)*f))
	return w
}

// Reset starts the schedule over (after a stream that worked).
func (b *Backoff) Reset() { b.step = 0 }

// Short is the pause after a stream that ended normally: half to one and a
// half times the base step, so that many devices do not reconnect at once.
func (b *Backoff) Short() time.Duration {
	base := b.Base
	if base <= 0 {
		base = 100 * time.Millisecond
	}
	return time.Duration((0.5 + rand.Float64()) * float64(base))
}
