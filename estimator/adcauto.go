package estimator

import "math"

// ADCBitsAuto asks ResolveADCBits to choose the converter resolution from
// the samples: the default of every command that reads raw recordings
// (estimate, calibrate pairs), so they treat the same file the same way.
const ADCBitsAuto = -1

// AutoADCBits is the resolution assumed for integer input under
// ADCBitsAuto: the common 16-bit converter of prototype front ends (common
// practice; a device with another converter says so with --adc-bits).
const AutoADCBits = 16

// ResolveADCBits returns bits unchanged unless it is ADCBitsAuto; then it
// returns AutoADCBits when every sample given is a whole number (converter
// codes) and 0 (resolution unknown: the clipping, sensor-off and resolution
// checks are skipped) when any is not, as with camera frame means.
// integer reports whether every sample was a whole number.
func ResolveADCBits(bits int, channels ...[]float64) (resolved int, integer bool) {
	integer = true
	for _, xs := range channels {
		for _, x := range xs {
			if x != math.Trunc(x) || math.IsInf(x, 0) {
				integer = false
				break
			}
		}
	}
	if bits != ADCBitsAuto {
		return bits, integer
	}
	if integer {
		return AutoADCBits, true
	}
	return 0, false
}
