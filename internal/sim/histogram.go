package sim

import (
	"math/bits"
	"sync/atomic"
	"time"
)

// Histogram counts durations in log-linear buckets: 32 buckets per power of
// two of microseconds, so a quantile is off by at most about 3 %. It is safe
// for concurrent use and does not allocate when recording.
type Histogram struct {
	counts [histBuckets]atomic.Uint64
	n      atomic.Uint64
}

const (
	histSubBits = 5
	histSub     = 1 << histSubBits
	histBuckets = (64 - histSubBits + 1) * histSub
)

func histIndex(us uint64) int {
	if us < histSub {
		return int(us)
	}
	e := bits.Len64(us) - histSubBits - 1 // us>>e is in [32, 64)
	return (e+1)*histSub + int(us>>e) - histSub
}

// histMid is the middle of bucket i in microseconds.
func histMid(i int) float64 {
	if i < histSub {
		return float64(i)
	}
	e := i/histSub - 1
	m := uint64(i%histSub + histSub)
	lo := m << e
	return float64(lo) + float64(uint64(1)<<e)/2
}

// Record adds one duration (negative counts as 0).
func (h *Histogram) Record(d time.Duration) {
	us := uint64(0)
	if d > 0 {
		us = uint64(d / time.Microsecond)
	}
	h.counts[histIndex(us)].Add(1)
	h.n.Add(1)
}

// Count is the number of recorded durations.
func (h *Histogram) Count() uint64 { return h.n.Load() }

// Quantile returns the q-quantile (0..1) in milliseconds, or 0 when empty.
func (h *Histogram) Quantile(q float64) float64 {
	n := h.n.Load()
	if n == 0 {
		return 0
	}
	rank := uint64(q*float64(n) + 0.5)
	if rank < 1 {
		rank = 1
	}
	if rank > n {
		rank = n
	}
	var c uint64
	for i := range h.counts {
		c += h.counts[i].Load()
		if c >= rank {
			return histMid(i) / 1000
		}
	}
	return histMid(histBuckets-1) / 1000
}
