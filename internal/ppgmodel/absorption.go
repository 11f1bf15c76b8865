package ppgmodel

import (
	"fmt"
	"math"
)

// extinction is the molar extinction coefficient table, cm^-1/M, of oxy- and
// deoxyhaemoglobin: S. Prahl's compiled tabulation (Oregon Medical Laser
// Center, data of W.B. Gratzer and N. Kollias), rows used by docs/references.md.
var extinction = []struct{ nm, hbo2, hb float64 }{
	{650, 368, 3750.12},
	{660, 319.6, 3226.56},
	{670, 294, 2795.12},
	{880, 1154, 726.44},
	{900, 1198, 761.84},
	{910, 1214, 774.56},
	{940, 1214, 693.44},
	{950, 1204, 602.24},
}

// MinNM and MaxNM bound the wavelengths the extinction table covers.
const (
	MinNM = 650.0
	MaxNM = 950.0
)

// Extinction returns the molar extinction coefficients (cm^-1/M) of
// oxyhaemoglobin and deoxyhaemoglobin at nm, interpolated linearly between
// tabulated wavelengths. Outside MinNM..MaxNM it is an error. Between 670 and
// 880 nm the table has no rows, so the interpolation there is coarse (the real
// spectra cross near 800 nm); prefer wavelengths near tabulated ones.
func Extinction(nm float64) (hbo2, hb float64, err error) {
	if math.IsNaN(nm) || nm < MinNM || nm > MaxNM {
		return 0, 0, fmt.Errorf("wavelength %v nm outside the extinction table %v..%v nm", nm, MinNM, MaxNM)
	}
	for i := 1; i < len(extinction); i++ {
		a, b := extinction[i-1], extinction[i]
		if nm <= b.nm {
			f := (nm - a.nm) / (b.nm - a.nm)
			return a.hbo2 + f*(b.hbo2-a.hbo2), a.hb + f*(b.hb-a.hb), nil
		}
	}
	last := extinction[len(extinction)-1]
	return last.hbo2, last.hb, nil
}

// TwoWavelength is the pure Beer-Lambert two-wavelength model: the extinction
// coefficients at a red and an infrared wavelength.
type TwoWavelength struct {
	RedHbO2, RedHb float64 // cm^-1/M at the red (first) wavelength
	IRHbO2, IRHb   float64 // cm^-1/M at the infrared (second) wavelength
}

// NewTwoWavelength looks up both wavelengths in the extinction table. The
// first must be shorter than the second, and the two must make the model
// invertible (different oxy/deoxy contrast).
func NewTwoWavelength(redNM, irNM float64) (TwoWavelength, error) {
	if !(redNM < irNM) {
		return TwoWavelength{}, fmt.Errorf("red wavelength %v nm must be shorter than infrared %v nm", redNM, irNM)
	}
	ro, rd, err := Extinction(redNM)
	if err != nil {
		return TwoWavelength{}, fmt.Errorf("red: %w", err)
	}
	io, id, err := Extinction(irNM)
	if err != nil {
		return TwoWavelength{}, fmt.Errorf("infrared: %w", err)
	}
	m := TwoWavelength{RedHbO2: ro, RedHb: rd, IRHbO2: io, IRHb: id}
	// R(S) is monotonic when the numerator and denominator slopes differ in
	// a way that makes R(0) != R(1).
	if math.Abs(m.Ratio(0)-m.Ratio(1)) < 1e-3 {
		return TwoWavelength{}, fmt.Errorf("wavelengths %v/%v nm give no saturation contrast", redNM, irNM)
	}
	return m, nil
}

// Ratio is the ratio of ratios R for saturation s (a fraction, 0..1):
// R = (e_HbO2(red) s + e_Hb(red)(1-s)) / (e_HbO2(ir) s + e_Hb(ir)(1-s)).
func (m TwoWavelength) Ratio(s float64) float64 {
	return (m.RedHbO2*s + m.RedHb*(1-s)) / (m.IRHbO2*s + m.IRHb*(1-s))
}

// Saturation inverts Ratio: s = (e_Hb(red) - R e_Hb(ir)) /
// (R (e_HbO2(ir) - e_Hb(ir)) - (e_HbO2(red) - e_Hb(red))). The result is not
// clamped; values outside 0..1 mean R is outside what the model can produce.
func (m TwoWavelength) Saturation(r float64) float64 {
	return (m.RedHb - r*m.IRHb) / (r*(m.IRHbO2-m.IRHb) - (m.RedHbO2 - m.RedHb))
}

// The empirical calibration line, common practice (often attributed to
// J.G. Webster (ed.), Design of Pulse Oximeters, 1997): SpO2 = 110 - 25 R,
// roughly valid for R in 0.4..1.0.
const (
	EmpiricalIntercept = 110.0 // % SpO2 at R = 0
	EmpiricalSlope     = 25.0  // % SpO2 per unit R
)

// EmpiricalSpO2 is the empirical line: 110 - 25 R, in percent, unclamped.
func EmpiricalSpO2(r float64) float64 { return EmpiricalIntercept - EmpiricalSlope*r }

// EmpiricalRatio inverts the empirical line: R = (110 - SpO2) / 25.
func EmpiricalRatio(spo2Pct float64) float64 {
	return (EmpiricalIntercept - spo2Pct) / EmpiricalSlope
}
