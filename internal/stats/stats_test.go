package stats

import (
	"math"
	"testing"
)

// Check values are worked by hand from the definitions (common practice:
// the middle value, the mean of the two middle ones for an even count, and
// Hyndman & Fan definition 7, which R's quantile() uses by default).
func TestMedian(t *testing.T) {
	for _, c := range []struct {
		x    []float64
		want float64
	}{
		{[]float64{3}, 3},
		{[]float64{5, 1, 3}, 3},
		{[]float64{4, 1, 3, 2}, 2.5},
		{[]float64{97, 95, 99, 96, 98, 94}, 96.5},
	} {
		if got := Median(append([]float64(nil), c.x...)); got != c.want {
			t.Errorf("Median(%v) = %v, want %v", c.x, got, c.want)
		}
	}
	if got := Median(nil); !math.IsNaN(got) {
		t.Errorf("Median(nil) = %v, want NaN", got)
	}
}

func TestQuantile(t *testing.T) {
	// R: quantile(c(1, 2, 3, 4, 10), c(0, .25, .5, .9, 1)) = 1 2 3 7.6 10.
	x := []float64{10, 4, 1, 3, 2}
	for _, c := range []struct{ p, want float64 }{{0, 1}, {0.25, 2}, {0.5, 3}, {0.9, 7.6}, {1, 10}} {
		if got := Quantile(c.p, x); math.Abs(got-c.want) > 1e-12 {
			t.Errorf("Quantile(%v) = %v, want %v", c.p, got, c.want)
		}
	}
	if got := Quantile(0.5, []float64{7}); got != 7 {
		t.Errorf("Quantile of one value = %v, want 7", got)
	}
	if got := Quantile(0.5, nil); !math.IsNaN(got) {
		t.Errorf("Quantile(nil) = %v, want NaN", got)
	}
}
