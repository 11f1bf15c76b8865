package estimator

import (
	"fmt"
	"math"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// Calibration maps a ratio of ratios R to SpO2 in percent. ok is false when
// the calibration has no valid value for R (not finite, or outside the range
// it is valid for); the estimator then withholds SpO2 but still reports R.
// *calibration.Curve (fitted curves loaded from a file) satisfies it.
type Calibration interface {
	SpO2(ratio float64) (pct float64, ok bool)
}

// EmpiricalMaxRatio is the largest R the empirical line is used for: at
// R = 2.4 it reads 50 %; below that the straight line has no basis.
const EmpiricalMaxRatio = 2.4

type empirical struct{}

// Empirical is the common-practice line SpO2 = 110 - 25 R (often attributed
// to Webster (ed.), Design of Pulse Oximeters, 1997), clamped to 100 % for
// R < 0.4 and withheld for R <= 0 or R > EmpiricalMaxRatio.
func Empirical() Calibration { return empirical{} }

func (empirical) SpO2(r float64) (float64, bool) {
	if !(r > 0 && r <= EmpiricalMaxRatio) {
		return math.NaN(), false
	}
	return math.Min(100, ppgmodel.EmpiricalSpO2(r)), true
}

func (empirical) String() string { return "empirical" }

type beerLambert struct {
	tw          ppgmodel.TwoWavelength
	redNM, irNM float64
}

// BeerLambert is the inverse of the pure two-wavelength Beer-Lambert model
// with the tabulated molar extinction coefficients of oxy- and
// deoxyhaemoglobin (Prahl's tabulation) at the given wavelengths,
// interpolated linearly between tabulated rows. Wavelengths outside
// ppgmodel.MinNM..ppgmodel.MaxNM (650..950 nm) are an error.
//
// The pure model ignores scattering: real sensors read higher at the same
// R, so expect it to read low on a real device; it suits physical models
// and as a sanity bound. R giving a saturation above 100 % (up to 105 %) is
// reported as 100 % (and down to -0.5 %, rounding, as 0 %); beyond, no value.
func BeerLambert(redNM, irNM float64) (Calibration, error) {
	tw, err := ppgmodel.NewTwoWavelength(redNM, irNM)
	if err != nil {
		return nil, fmt.Errorf("beer-lambert calibration: %w", err)
	}
	return beerLambert{tw: tw, redNM: redNM, irNM: irNM}, nil
}

func (b beerLambert) SpO2(r float64) (float64, bool) {
	if !(r > 0) || math.IsInf(r, 0) {
		return math.NaN(), false
	}
	s := 100 * b.tw.Saturation(r)
	if !(s >= -0.5 && s <= 105) {
		return math.NaN(), false
	}
	return math.Max(0, math.Min(100, s)), true
}

func (b beerLambert) String() string {
	return fmt.Sprintf("beer-lambert %g/%g nm", b.redNM, b.irNM)
}
