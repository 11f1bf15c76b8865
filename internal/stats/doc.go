// Package stats holds the order statistics the engines share: the median
// and the quantile by linear interpolation of a slice of float64. Each sorts
// its argument in place so the hot paths (the estimator's beat window) do
// not allocate; callers that still need the original order pass a copy.
package stats
