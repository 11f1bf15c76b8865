package pairing

import (
	"math"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// A fitted curve is what the estimator applies in the field.
var _ estimator.Calibration = (*calibration.Curve)(nil)

// TestFittedCurveCorrectsTheEstimator closes the loop on a generated device
// whose optics follow the pure Beer-Lambert model (docs/references.md, Prahl
// tabulation, seen) rather than the empirical line the estimator assumes
// by default: pair a breathe-down recording, fit, write and load the curve
// file, and run the estimator with it on a second recording.
func TestFittedCurveCorrectsTheEstimator(t *testing.T) {
	raw, ref := recording(t, 600)
	pairs, _, err := FromRecording(strings.NewReader(raw), strings.NewReader(ref),
		Options{RateHz: 100, ADCBits: 16, Align: calibration.AlignOptions{Subject: "bench-7"}, ReferenceSubject: "bench-7"})
	if err != nil {
		t.Fatal(err)
	}
	res, err := calibration.Calibrate(pairs, calibration.FitOptions{Model: calibration.Quadratic, Name: "bench-bl"})
	if err != nil {
		t.Fatal(err)
	}
	file, err := res.Curve.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	curve, err := calibration.Parse(file)
	if err != nil {
		t.Fatal(err)
	}
	score := func(cal estimator.Calibration) (arms float64, n int) {
		const rate = 100
		src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Relation: ppgmodel.RelationBeerLambert, Seed: 99})
		st, err := estimator.New(estimator.Config{SampleRateHz: rate, ADCBits: 16, Calibration: cal})
		if err != nil {
			t.Fatal(err)
		}
		red, ir := make([]float64, rate), make([]float64, rate)
		var out []estimator.Estimate
		var sq float64
		for k := 0; k < 600; k++ {
			v := ppgmodel.DefaultVitals()
			v.SpO2Pct = staircase(k)
			src.Fill(red, ir, nil, v)
			out = st.Push(red, ir, nil, out[:0])
			for _, e := range out {
				// Score plateau seconds only, after the averaging window has
				// filled with the new level.
				s := int(e.Second)
				if math.IsNaN(e.SpO2Pct) || staircase(s) != staircase(s-15) {
					continue
				}
				d := e.SpO2Pct - staircase(s)
				sq += d * d
				n++
			}
		}
		return math.Sqrt(sq / float64(n)), n
	}
	before, n0 := score(nil)
	after, n1 := score(curve)
	t.Logf("estimator Arms on plateaus: empirical line %.2f %% (n=%d), fitted curve %.2f %% (n=%d)", before, n0, after, n1)
	// The curve's valid range (fitted ratios plus a margin) must not withhold
	// plateau seconds at the calibrated extremes (97 % and 70 %).
	if n1 < n0*95/100 {
		t.Fatalf("%d plateau seconds with a value under the fitted curve, %d under the empirical line", n1, n0)
	}
	// FDA 2013 guidance (docs/references.md, seen in a secondary source):
	// Arms <= 3.0 % for transmittance sensors; the fitted curve must meet it
	// on its own device, and the empirical line must not (it is the wrong
	// curve for pure Beer-Lambert optics: R(90 %) = 0.5252 reads 96.9 %).
	if !(after <= 3.0) {
		t.Errorf("Arms with the fitted curve %.2f %%, want <= 3.0 %%", after)
	}
	if !(before > 3.0 && after < before/2) {
		t.Errorf("Arms empirical %.2f %%, fitted %.2f %%: want the fit to at least halve a > 3 %% error", before, after)
	}
}
