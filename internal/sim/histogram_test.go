package sim

import (
	"math"
	"testing"
	"time"
)

// Quantiles of a known distribution (uniform 1..10,000 ms in 1 ms steps:
// p50 = 5,000 ms, p99 = 9,900 ms by the nearest-rank definition) come back
// within the bucket resolution of about 3 %.
func TestHistogramQuantiles(t *testing.T) {
	var h Histogram
	for ms := 1; ms <= 10000; ms++ {
		h.Record(time.Duration(ms) * time.Millisecond)
	}
	for q, want := range map[float64]float64{0.5: 5000, 0.99: 9900, 0.001: 10, 1: 10000} {
		got := h.Quantile(q)
		if math.Abs(got-want)/want > 0.035 {
			t.Errorf("q%v = %v ms, want %v +- 3.5 %%", q, got, want)
		}
	}
	if h.Count() != 10000 {
		t.Errorf("count %d", h.Count())
	}
	var empty Histogram
	if empty.Quantile(0.5) != 0 {
		t.Error("empty histogram quantile not 0")
	}
	// Sub-millisecond values keep microsecond resolution.
	var fine Histogram
	fine.Record(20 * time.Microsecond)
	if got := fine.Quantile(0.5); got < 0.019 || got > 0.021 {
		t.Errorf("20 us recorded as %v ms", got)
	}
}
