package main

import (
	"fmt"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// Fitted curves are used by the estimator as they are.
var _ estimator.Calibration = (*calibration.Curve)(nil)

// Names accepted by --calibration besides a file path.
const (
	calibrationEmpirical   = "empirical"
	calibrationBeerLambert = "beer-lambert"
)

// resolveCalibration turns a --calibration argument into a calibration:
// "empirical" (or "") is SpO2 = 110 - 25 R; "beer-lambert" is the inverse
// two-wavelength model at redNM/irNM (nm, 650..950); anything else is the
// path of a fitted curve file (calibration.Load). Errors name the flag.
func resolveCalibration(arg string, redNM, irNM float64) (estimator.Calibration, error) {
	switch arg {
	case "", calibrationEmpirical:
		return estimator.Empirical(), nil
	case calibrationBeerLambert:
		c, err := estimator.BeerLambert(redNM, irNM)
		if err != nil {
			return nil, fmt.Errorf("--calibration %s with --red-nm %v --ir-nm %v: %w", arg, redNM, irNM, err)
		}
		return c, nil
	}
	c, err := calibration.Load(arg)
	if err != nil {
		return nil, fmt.Errorf("--calibration %q (not %s or %s, so a curve file): %w", arg, calibrationEmpirical, calibrationBeerLambert, err)
	}
	if c.Anchored() {
		return nil, fmt.Errorf("--calibration %q: input: %s (anchor_s: %d): the curve maps R/R0, R0 a device's room-air anchor, and this command gives the raw ratio R; "+
			"such a curve applies only in the gateway, which takes each device's anchor (README, \"Room-air anchor\")", arg, c.Input, c.AnchorS)
	}
	return c, nil
}
