package estimator

import (
	"math"
	"testing"
)

// The empirical line SpO2 = 110 - 25 R (docs/references.md, common practice;
// Webster 1997 from memory): R 0.4 -> 100, 0.5 -> 97.5, 1.0 -> 85.
func TestEmpiricalCalibration(t *testing.T) {
	cal := Empirical()
	for _, c := range []struct{ r, want float64 }{
		{0.4, 100},  // docs/references.md
		{0.5, 97.5}, // docs/references.md
		{1.0, 85},   // docs/references.md
		{1.6, 70},   // the same line: 110 - 40
		{0.2, 100},  // above 100 % is clamped
	} {
		got, ok := cal.SpO2(c.r)
		if !ok || math.Abs(got-c.want) > 1e-9 {
			t.Errorf("Empirical().SpO2(%v) = %v, %v; want %v", c.r, got, ok, c.want)
		}
	}
	for _, r := range []float64{0, -0.1, 2.5, math.NaN(), math.Inf(1)} {
		if v, ok := cal.SpO2(r); ok {
			t.Errorf("Empirical().SpO2(%v) = %v, want no value", r, v)
		}
	}
}

// The inverse of the two-wavelength Beer-Lambert model at 660/940 nm,
// docs/references.md worked values computed from Prahl's tabulation (seen).
func TestBeerLambertCalibration660940(t *testing.T) {
	cal, err := BeerLambert(660, 940)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ r, want, tol float64 }{
		{0.5, 90.93, 0.005}, // docs/references.md: S(R=0.5) = 90.93 %
		{1.0, 73.91, 0.005}, // docs/references.md: S(1.0) = 73.91 %
		{2.0, 46.60, 0.005}, // docs/references.md: S(2.0) = 46.60 %
		{0.2633, 100, 0.02}, // docs/references.md: R(S=100 %) = 0.2633
		{0.3395, 97, 0.02},  // docs/references.md: R(97 %) = 0.3395
		{0.5252, 90, 0.02},  // docs/references.md: R(90 %) = 0.5252
		{0.6652, 85, 0.02},  // docs/references.md: R(85 %) = 0.6652
		{1.1265, 70, 0.02},  // docs/references.md: R(70 %) = 1.1265
		{4.6530, 0, 0.02},   // docs/references.md: R(0 %) = 4.6530
		{0.25, 100, 0},      // 100.6 %: slightly above 100 % reads 100
	} {
		got, ok := cal.SpO2(c.r)
		if !ok || math.Abs(got-c.want) > c.tol {
			t.Errorf("BeerLambert(660, 940).SpO2(%v) = %.4f, %v; want %v", c.r, got, ok, c.want)
		}
	}
	for _, r := range []float64{0, 0.1, 5, math.NaN()} {
		if v, ok := cal.SpO2(r); ok {
			t.Errorf("BeerLambert(660, 940).SpO2(%v) = %v, want no value (outside -0.5..105 %% or not positive)", r, v)
		}
	}
}

// Wavelengths between table rows are interpolated; outside the table
// (650..950 nm) they are an error.
func TestBeerLambertWavelengths(t *testing.T) {
	for _, c := range []struct {
		red, ir float64
		ok      bool
	}{
		{660, 940, true},
		{655, 905, true}, // between rows
		{650, 950, true}, // the table's ends
		{645, 940, false},
		{660, 960, false},
		{940, 660, false}, // swapped
		{530, 660, false}, // green camera channel: not in the table
	} {
		_, err := BeerLambert(c.red, c.ir)
		if (err == nil) != c.ok {
			t.Errorf("BeerLambert(%v, %v) error = %v, want ok=%v", c.red, c.ir, err, c.ok)
		}
	}
	// 665 nm lies halfway between 660 and 670: its reading of a given R sits
	// between theirs.
	a, _ := BeerLambert(660, 940)
	b, _ := BeerLambert(665, 940)
	c, _ := BeerLambert(670, 940)
	sa, _ := a.SpO2(0.5)
	sb, _ := b.SpO2(0.5)
	sc, _ := c.SpO2(0.5)
	if !(sb > math.Min(sa, sc) && sb < math.Max(sa, sc)) {
		t.Errorf("S(R=0.5) at 660/665/670 nm = %.2f/%.2f/%.2f, want the middle one between", sa, sb, sc)
	}
}
