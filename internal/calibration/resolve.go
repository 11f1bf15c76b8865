package calibration

import (
	"errors"
	"fmt"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/estimator"
)

// Lookup returns the YAML of a stored curve (version 0 asks for the latest)
// and the version it found; store.DB.CalibrationCurve is one.
type Lookup func(name string, version uint32) (curveYAML string, found uint32, err error)

// ErrNotStored: a reference names a curve but there is no store to look in.
var ErrNotStored = errors.New("not a stored calibration")

// Resolve turns a calibration reference into a calibration and the reference
// as applied. It is the one place where the gateway (for a device's stream)
// and tune (re-estimating stored raw captures) read references:
//
//	"" or "empirical"            SpO2 = 110 - 25 R
//	"beer-lambert"               the two-wavelength model at redNM/irNM
//	"beer-lambert@RED/IRnm"      the same at the given wavelengths (as applied references read)
//	"name" or "name@vN"          a stored curve (latest version, or version N), via lookup
//
// Applied references are "empirical", "beer-lambert@660/940nm" or "name@vN".
func Resolve(ref string, redNM, irNM float64, lookup Lookup) (estimator.Calibration, string, error) {
	switch {
	case ref == "" || ref == "empirical":
		return estimator.Empirical(), "empirical", nil
	case ref == "beer-lambert" || strings.HasPrefix(ref, "beer-lambert@"):
		if nm, ok := strings.CutPrefix(ref, "beer-lambert@"); ok {
			r, i, found := strings.Cut(strings.TrimSuffix(nm, "nm"), "/")
			var err1, err2 error
			redNM, err1 = strconv.ParseFloat(r, 64)
			irNM, err2 = strconv.ParseFloat(i, 64)
			if !found || err1 != nil || err2 != nil {
				return nil, "", fmt.Errorf("calibration %q: want beer-lambert@RED/IRnm like beer-lambert@660/940nm", ref)
			}
		}
		c, err := estimator.BeerLambert(redNM, irNM)
		if err != nil {
			return nil, "", fmt.Errorf("calibration %q: %w", ref, err)
		}
		return c, fmt.Sprintf("beer-lambert@%g/%gnm", redNM, irNM), nil
	}
	name, version := ref, uint64(0)
	if n, v, ok := strings.Cut(ref, "@v"); ok {
		var err error
		if version, err = strconv.ParseUint(v, 10, 32); err != nil || version == 0 {
			return nil, "", fmt.Errorf("calibration %q: version %q, want a whole number >= 1 after @v", ref, v)
		}
		name = n
	}
	if lookup == nil {
		return nil, "", fmt.Errorf("calibration %q: %w (want empirical, beer-lambert or a stored name@vN)", ref, ErrNotStored)
	}
	y, found, err := lookup(name, uint32(version))
	if err != nil {
		return nil, "", fmt.Errorf("calibration %q: %w", ref, err)
	}
	c, err := Parse([]byte(y))
	if err != nil {
		return nil, "", fmt.Errorf("stored calibration %s@v%d: %w", name, found, err)
	}
	return c, fmt.Sprintf("%s@v%d", c.Name, found), nil
}
