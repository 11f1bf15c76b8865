package calibration

import (
	"bytes"
	"math"
	"strings"
	"testing"

	"pgregory.net/rapid"
)

// pairsFrom samples a known curve at evenly spaced ratios, noise-free.
func pairsFrom(c []float64, lo, hi float64, n int, subject string) []Pair {
	out := make([]Pair, n)
	for i := range out {
		r := lo + (hi-lo)*float64(i)/float64(n-1)
		out[i] = Pair{Ratio: r, ReferencePct: polyval(c, r), Subject: subject}
	}
	return out
}

func TestFitRecoversKnownCurvesExactly(t *testing.T) {
	for _, tc := range []struct {
		name, model string
		coef        []float64
		lo, hi      float64
	}{
		// docs/references.md: empirical line SpO2 = 110 - 25 R, common practice
		// (often attributed to Webster 1997, memory); valid R 0.4..1.0.
		{"empirical line 110-25R", Linear, []float64{110, -25}, 0.4, 1.0},
		// A made-up curved calibration, bending down at high R as fitted
		// curves of real sensors do; any quadratic must come back exactly.
		{"quadratic 107.2-17.5R-4.1R^2", Quadratic, []float64{107.2, -17.5, -4.1}, 0.4, 1.6},
		// A quadratic model fitted to points on a line finds c2 = 0.
		{"quadratic model on a line", Quadratic, []float64{110, -25, 0}, 0.4, 1.0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			pairs := pairsFrom(tc.coef, tc.lo, tc.hi, 25, "")
			// Through the CSV file format too: what calibrate reads.
			var buf bytes.Buffer
			if err := WritePairs(&buf, pairs); err != nil {
				t.Fatal(err)
			}
			read, err := ReadPairs(&buf)
			if err != nil {
				t.Fatal(err)
			}
			curve, err := Fit(read, FitOptions{Model: tc.model, Name: "known", RangeMargin: -1})
			if err != nil {
				t.Fatal(err)
			}
			if len(curve.Coefficients) != len(tc.coef) {
				t.Fatalf("coefficients %v, want %d values", curve.Coefficients, len(tc.coef))
			}
			for i, want := range tc.coef {
				if got := curve.Coefficients[i]; math.Abs(got-want) > 1e-9 {
					t.Errorf("c%d = %.12g, want %.12g (|diff| %.3g > 1e-9)", i, got, want, math.Abs(got-want))
				}
			}
			if curve.RatioMin != tc.lo || curve.RatioMax != tc.hi {
				t.Errorf("ratio range [%v, %v], want the fitted range [%v, %v]", curve.RatioMin, curve.RatioMax, tc.lo, tc.hi)
			}
		})
	}
}

func TestFitEmpiricalLineWorkedValues(t *testing.T) {
	// docs/references.md worked values of SpO2 = 110 - 25 R (common practice):
	// R 0.4 -> 100, 0.5 -> 97.5, 1.0 -> 85.
	pairs := []Pair{{Ratio: 0.4, ReferencePct: 100}, {Ratio: 0.5, ReferencePct: 97.5}, {Ratio: 1.0, ReferencePct: 85}}
	curve, err := Fit(pairs, FitOptions{Model: Linear, Name: "webster"})
	if err != nil {
		t.Fatal(err)
	}
	// Valid range: the fitted 0.4..1.0 widened by the default 10 % of the span.
	if math.Abs(curve.RatioMin-0.34) > 1e-12 || math.Abs(curve.RatioMax-1.06) > 1e-12 {
		t.Errorf("ratio range [%v, %v], want [0.34, 1.06]", curve.RatioMin, curve.RatioMax)
	}
	for _, p := range pairs {
		got, ok := curve.SpO2(p.Ratio)
		if !ok || math.Abs(got-p.ReferencePct) > 1e-9 {
			t.Errorf("SpO2(%v) = %v, %v; want %v", p.Ratio, got, ok, p.ReferencePct)
		}
	}
	if _, ok := curve.SpO2(1.2); ok {
		t.Error("SpO2(1.2) outside the valid range [0.34, 1.06] gave a value, want none")
	}
}

func TestFitLeastSquaresWithNoise(t *testing.T) {
	// Symmetric residuals +e/-e at each ratio cancel: the least-squares line
	// through them is the line they straddle.
	var pairs []Pair
	for _, p := range pairsFrom([]float64{110, -25}, 0.5, 1.2, 9, "") {
		pairs = append(pairs, Pair{Ratio: p.Ratio, ReferencePct: p.ReferencePct + 1.5}, Pair{Ratio: p.Ratio, ReferencePct: p.ReferencePct - 1.5})
	}
	c, err := FitCoefficients(pairs, Linear)
	if err != nil {
		t.Fatal(err)
	}
	if math.Abs(c[0]-110) > 1e-9 || math.Abs(c[1]+25) > 1e-9 {
		t.Errorf("coefficients %v, want [110 -25]", c)
	}
}

func TestFitRejectsTooFewDistinctRatios(t *testing.T) {
	pairs := []Pair{{Ratio: 0.5, ReferencePct: 97}, {Ratio: 0.5, ReferencePct: 96}, {Ratio: 0.7, ReferencePct: 92}}
	if _, err := FitCoefficients(pairs, Linear); err != nil {
		t.Errorf("linear fit on 2 distinct ratios: %v, want success", err)
	}
	_, err := FitCoefficients(pairs, Quadratic)
	if err == nil || !strings.Contains(err.Error(), "2 distinct ratios, want >= 3") {
		t.Errorf("quadratic fit on 2 distinct ratios: error %v, want one naming the count and the bound", err)
	}
	if _, err := FitCoefficients(pairs, "cubic"); err == nil || !strings.Contains(err.Error(), "model") {
		t.Errorf("unknown model: error %v, want one naming the field model", err)
	}
}

func TestFitPropertyRecoversAnyQuadratic(t *testing.T) {
	rapid.Check(t, func(t *rapid.T) {
		c := []float64{
			rapid.Float64Range(80, 130).Draw(t, "c0"),
			rapid.Float64Range(-40, -5).Draw(t, "c1"),
			rapid.Float64Range(-10, 10).Draw(t, "c2"),
		}
		lo := rapid.Float64Range(0.1, 1).Draw(t, "lo")
		hi := lo + rapid.Float64Range(0.3, 2).Draw(t, "span")
		n := rapid.IntRange(3, 200).Draw(t, "n")
		var pairs []Pair
		for _, p := range pairsFrom(c, lo, hi, n, "") {
			if p.ReferencePct >= 0 && p.ReferencePct <= 100 {
				pairs = append(pairs, p)
			}
		}
		if len(pairs) < 3 {
			t.Skip("curve leaves 0..100 % almost everywhere")
		}
		got, err := FitCoefficients(pairs, Quadratic)
		if err != nil {
			t.Fatal(err)
		}
		for i := range c {
			if math.Abs(got[i]-c[i]) > 1e-7 {
				t.Fatalf("c%d = %.12g, want %.12g", i, got[i], c[i])
			}
		}
	})
}
