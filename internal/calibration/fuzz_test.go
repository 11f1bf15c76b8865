package calibration

import (
	"math"
	"slices"
	"testing"
)

// FuzzParseCurve: any bytes either fail with an error or give a curve that
// validates, survives Marshal and Parse unchanged, and maps every ratio in
// its range to 0..100 % (and none outside it).
func FuzzParseCurve(f *testing.F) {
	for _, s := range []string{
		"name: textbook-linear\nversion: 1\nmodel: linear\ncoefficients: [110, -25]\nratio_min: 0.4\nratio_max: 2.0\n",
		"name: proto-a\nversion: 3\nmodel: quadratic\ncoefficients: [104.5, -17.2, -5.1]\nratio_min: 0.3\nratio_max: 3\ndevice_model: a1\nfitted_at: 2026-11-30T22:00:00Z\nstats: {n: 120, rmse: 2.1}\n",
		"name: x\nversion: 0\nmodel: linear\ncoefficients: [1, 2]\nratio_min: 0\nratio_max: 1\n",
		"name: x\nversion: 1\nmodel: cubic\ncoefficients: [1, 2, 3, 4]\nratio_min: 0\nratio_max: 1\n",
		"name: x\nversion: 1\nmodel: linear\ncoefficients: [.nan, 2]\nratio_min: 0\nratio_max: 1\n",
		"name: x\nversion: 1\nmodel: linear\ncoefficients: [1, 2]\nratio_min: 2\nratio_max: 1\n",
		"name: x\nunknown: 1\n",
		"[1, 2",
		"",
	} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		c, err := Parse(data)
		if err != nil {
			if c != nil {
				t.Fatal("a curve with an error")
			}
			return
		}
		if err := c.Validate(); err != nil {
			t.Fatalf("parsed curve does not validate: %v", err)
		}
		b, err := c.Marshal()
		if err != nil {
			t.Fatalf("marshal: %v", err)
		}
		c2, err := Parse(b)
		if err != nil {
			t.Fatalf("re-parse of %q: %v", b, err)
		}
		if c2.Name != c.Name || c2.Version != c.Version || c2.Model != c.Model || !slices.Equal(c2.Coefficients, c.Coefficients) ||
			c2.RatioMin != c.RatioMin || c2.RatioMax != c.RatioMax {
			t.Fatalf("round trip changed the curve: %+v -> %+v", c, c2)
		}
		for i := 0; i <= 16; i++ {
			r := c.RatioMin + (c.RatioMax-c.RatioMin)*float64(i)/16
			v, ok := c.SpO2(r)
			if !ok || !(v >= 0 && v <= 100) {
				t.Fatalf("SpO2(%v) = %v, %v inside [%v, %v]", r, v, ok, c.RatioMin, c.RatioMax)
			}
		}
		for _, r := range []float64{c.RatioMax + 1e-9*math.Max(1, c.RatioMax), math.NaN(), math.Inf(1)} {
			if _, ok := c.SpO2(r); ok {
				t.Fatalf("SpO2(%v) accepted outside [%v, %v]", r, c.RatioMin, c.RatioMax)
			}
		}
	})
}
