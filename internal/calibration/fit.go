package calibration

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Model names accepted by Fit and written to the curve file.
const (
	Linear    = "linear"    // SpO2 = c0 + c1 R
	Quadratic = "quadratic" // SpO2 = c0 + c1 R + c2 R^2
)

// degree returns the polynomial degree of a model, or 0 for an unknown one.
func degree(model string) int {
	switch model {
	case Linear:
		return 1
	case Quadratic:
		return 2
	}
	return 0
}

// FitCoefficients fits SpO2 = c0 + c1 R [+ c2 R^2] to the pairs by least
// squares (QR decomposition of the design matrix, gonum/mat), each pair
// weighted by its Weight (unset = 1; ordinary least squares when no pair
// has one), and returns c0, c1[, c2]. It needs at least degree+1 distinct
// ratios.
func FitCoefficients(pairs []Pair, model string) ([]float64, error) {
	deg := degree(model)
	if deg == 0 {
		return nil, fmt.Errorf("model: %q, want %s or %s", model, Linear, Quadratic)
	}
	for i, p := range pairs {
		if err := p.validate(); err != nil {
			return nil, fmt.Errorf("pairs[%d]: %w", i, err)
		}
	}
	distinct := map[float64]bool{}
	for _, p := range pairs {
		distinct[p.Ratio] = true
	}
	if len(distinct) < deg+1 {
		return nil, fmt.Errorf("pairs: %d distinct ratios, want >= %d for a %s fit", len(distinct), deg+1, model)
	}
	n, k := len(pairs), deg+1
	x := mat.NewDense(n, k, nil)
	y := mat.NewVecDense(n, nil)
	for i, p := range pairs {
		sw := math.Sqrt(p.weight())
		v := sw
		for j := 0; j < k; j++ {
			x.Set(i, j, v)
			v *= p.Ratio
		}
		y.SetVec(i, sw*p.ReferencePct)
	}
	var qr mat.QR
	qr.Factorize(x)
	var b mat.VecDense
	if err := qr.SolveVecTo(&b, false, y); err != nil {
		return nil, fmt.Errorf("least-squares %s fit: %w", model, err)
	}
	c := make([]float64, k)
	for j := range c {
		c[j] = b.AtVec(j)
		if math.IsNaN(c[j]) || math.IsInf(c[j], 0) {
			return nil, fmt.Errorf("least-squares %s fit: coefficient %d is %v", model, j, c[j])
		}
	}
	return c, nil
}

// FitOptions name the curve Fit returns.
type FitOptions struct {
	// Model is Linear or Quadratic; required.
	Model string
	// Name of the curve ([a-z0-9._-], 1..64); required.
	Name string
	// Version of the curve; zero means 1.
	Version int
	// DeviceModel the pairs were recorded with; optional.
	DeviceModel string
	// FittedAt is an RFC 3339 time written to the file; optional. The
	// package never reads the clock.
	FittedAt string
	// RangeMargin widens the curve's valid ratio range beyond the fitted
	// ratios by this fraction of their span on each side, so that a device
	// at the edge of the calibrated range (say at 99 % when the pairs top
	// out there) is not withheld half of the time by its own noise.
	// 0 = 0.1; negative = none (exactly the fitted range).
	RangeMargin float64
}

// Fit fits a curve to the pairs. Its valid ratio range is the range of the
// ratios fitted, widened by RangeMargin: outside it the curve yields no
// value rather than an extrapolation.
func Fit(pairs []Pair, opts FitOptions) (*Curve, error) {
	c, err := FitCoefficients(pairs, opts.Model)
	if err != nil {
		return nil, err
	}
	lo, hi := ratioRange(pairs)
	m := opts.RangeMargin
	if m == 0 {
		m = 0.1
	}
	if m > 0 {
		span := hi - lo
		lo, hi = math.Max(0, lo-m*span), math.Min(maxRatio, hi+m*span)
	}
	v := opts.Version
	if v == 0 {
		v = 1
	}
	curve := &Curve{
		Name: opts.Name, Version: v, Model: opts.Model, Coefficients: c,
		RatioMin: lo, RatioMax: hi, DeviceModel: opts.DeviceModel, FittedAt: opts.FittedAt,
	}
	if err := curve.Validate(); err != nil {
		return nil, fmt.Errorf("fitted curve: %w", err)
	}
	return curve, nil
}

func ratioRange(pairs []Pair) (lo, hi float64) {
	lo, hi = math.Inf(1), math.Inf(-1)
	for _, p := range pairs {
		lo = math.Min(lo, p.Ratio)
		hi = math.Max(hi, p.Ratio)
	}
	return lo, hi
}

// polyval evaluates c0 + c1 x + c2 x^2 + ... without range checks or
// clamping.
func polyval(c []float64, x float64) float64 {
	v := 0.0
	for i := len(c) - 1; i >= 0; i-- {
		v = v*x + c[i]
	}
	return v
}
