package main

import (
	"fmt"
	"math"
	"strings"

	"github.com/pulsefleet/pulsefleet/estimator"
)

// adcBitsUsage is the --adc-bits help of every command that reads raw
// recordings (estimate, calibrate pairs): one default, one meaning.
var adcBitsUsage = fmt.Sprintf("converter resolution in bits for the clipping, sensor-off and resolution checks: %d..%d; "+
	"0 = unknown (float data such as camera frame means: those checks are skipped); "+
	"%d = auto (%d for whole-number samples, unknown when any sample has a fraction)",
	estimator.MinADCBits, estimator.MaxADCBits, estimator.ADCBitsAuto, estimator.AutoADCBits)

// checkADCBits checks an --adc-bits value.
func checkADCBits(bits int) error {
	if bits == 0 || bits == estimator.ADCBitsAuto || (bits >= estimator.MinADCBits && bits <= estimator.MaxADCBits) {
		return nil
	}
	return usagef("--adc-bits: %d, want %d (auto), 0 (unknown) or %d..%d", bits, estimator.ADCBitsAuto, estimator.MinADCBits, estimator.MaxADCBits)
}

// estimatorFlagNames are the names of estimator.Flags bits, in bit order.
var estimatorFlagNames = [...]string{"no_pulse", "sensor_off", "clipping", "motion", "low_resolution"}

// resolveADCBits applies --adc-bits to the buffered first samples and says
// on standard error what it chose when the input is not converter codes.
func (e *estimateRun) resolveADCBits() int {
	bits, integer := estimator.ResolveADCBits(e.opts.adcBits, e.red, e.ir)
	switch {
	case !integer && e.opts.adcBits == estimator.ADCBitsAuto:
		fmt.Fprintf(e.warn, "pulsefleet estimate: %s has samples that are not whole numbers (float data such as camera frame means): "+
			"ADC resolution treated as unknown, so the clipping, sensor-off and resolution checks are skipped; give --adc-bits N for converter codes\n", e.name)
	case !integer && bits > 0:
		fmt.Fprintf(e.warn, "pulsefleet estimate: warning: --adc-bits %d given but %s has samples that are not whole numbers; "+
			"seconds may be withheld as low_resolution or clipping: use --adc-bits 0 (unknown) for float data\n", bits, e.name)
	}
	return bits
}

// count tallies one written second for the withheld warning.
func (e *estimateRun) count(x estimator.Estimate) {
	e.seconds++
	if !math.IsNaN(x.SpO2Pct) {
		return
	}
	e.withheld++
	for i := range e.flagSeconds {
		if x.Flags&(1<<i) != 0 {
			e.flagSeconds[i]++
		}
	}
}

// warnWithheld ends a run in which more than half of the seconds have no
// SpO2 with a warning saying why (seconds per flag).
func (e *estimateRun) warnWithheld() {
	if e.seconds == 0 || 2*e.withheld <= e.seconds {
		return
	}
	var why []string
	for i, n := range e.flagSeconds {
		if n > 0 {
			why = append(why, fmt.Sprintf("%s %d", estimatorFlagNames[i], n))
		}
	}
	reason := "no flag set (no stable ratio yet)"
	if len(why) > 0 {
		reason = strings.Join(why, ", ")
	}
	hint := ""
	if e.flagSeconds[4] > 0 || e.flagSeconds[2] > 0 || e.flagSeconds[1] > 0 {
		hint = "; for float data give --adc-bits 0 (unknown resolution)"
	}
	fmt.Fprintf(e.warn, "pulsefleet estimate: warning: %d of %d seconds withheld (%.0f %%): %s (seconds per flag; --flags writes them per row)%s\n",
		e.withheld, e.seconds, 100*float64(e.withheld)/float64(e.seconds), reason, hint)
}
