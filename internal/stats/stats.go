package stats

import (
	"math"
	"slices"
)

// Median sorts x in place and returns its middle value, the mean of the two
// middle values for an even count (common practice); NaN when x is empty.
func Median(x []float64) float64 {
	n := len(x)
	if n == 0 {
		return math.NaN()
	}
	slices.Sort(x)
	if n%2 == 1 {
		return x[n/2]
	}
	return (x[n/2-1] + x[n/2]) / 2
}

// Quantile sorts x in place and returns its p-quantile (0 <= p <= 1) by
// linear interpolation between order statistics at (n-1)p, the usual
// convention (Hyndman & Fan's definition 7, the default of R and NumPy);
// NaN when x is empty.
func Quantile(p float64, x []float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	slices.Sort(x)
	if len(x) == 1 {
		return x[0]
	}
	h := p * float64(len(x)-1)
	lo := math.Floor(h)
	i := int(lo)
	if i+1 >= len(x) {
		return x[len(x)-1]
	}
	return x[i] + (h-lo)*(x[i+1]-x[i])
}
