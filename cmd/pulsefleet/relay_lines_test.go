package main

import (
	"fmt"
	"strconv"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// ppgLines renders seconds of the physical PPG model (ppgmodel) at rateHz
// as relay text lines "red,ir" with ADC codes of adcBits, optionally after
// a header line.
func ppgLines(seconds int, rateHz float64, adcBits int, seed uint64, header bool) []string {
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rateHz, ADCBits: adcBits, Seed: seed})
	n := int(float64(seconds) * rateHz)
	red, ir := make([]float64, n), make([]float64, n)
	src.Fill(red, ir, nil, ppgmodel.DefaultVitals())
	var out []string
	if header {
		out = append(out, "red,ir")
	}
	for i := 0; i < n; i++ {
		out = append(out, strconv.FormatUint(uint64(red[i]), 10)+","+strconv.FormatUint(uint64(ir[i]), 10))
	}
	_ = fmt.Sprint()
	return out
}
