package calibration

import (
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/estimator"
)

const anchoredYAML = `name: cam-anchored
version: 1
model: linear
coefficients: [190.9, -95.3]
ratio_min: 0.2
ratio_max: 2.5
input: anchored_ratio
anchor_s: 60
anchor_min_sqi: 0.5
anchor_min_seconds: 10
`

// An anchored curve file parses, says what anchor it needs, and every
// consumer that would feed it the raw ratio refuses it naming the field.
func TestAnchoredCurveFile(t *testing.T) {
	c, err := Parse([]byte(anchoredYAML))
	if err != nil {
		t.Fatal(err)
	}
	if got := c.AnchorSpec(); got != (estimator.AnchorSpec{LengthS: 60, MinSQI: 0.5, MinSeconds: 10}) {
		t.Fatalf("AnchorSpec = %+v", got)
	}
	if eq := c.Equation(); eq != "SpO2 = 190.9 - 95.3 (R/R0)" {
		t.Errorf("Equation = %q", eq)
	}
	// Round trip keeps the marker.
	b, err := c.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	if c2, err := Parse(b); err != nil || !c2.Anchored() || c2.AnchorS != 60 {
		t.Fatalf("round trip: %v anchored=%v", err, c2 != nil && c2.Anchored())
	}
	// Raw-input consumers: the estimator's stream and timeline (estimate,
	// replay, tune, the gateway without an anchor) refuse it.
	for name, err := range map[string]error{
		"New":         func() error { _, err := estimator.New(estimator.Config{SampleRateHz: 100, Calibration: c}); return err }(),
		"NewTimeline": func() error { _, err := estimator.NewTimeline(estimator.Config{Calibration: c}); return err }(),
	} {
		if err == nil || !strings.Contains(err.Error(), "input: anchored_ratio") || !strings.Contains(err.Error(), "cam-anchored@v1") {
			t.Errorf("%s with an anchored curve: %v, want a refusal naming the curve and input: anchored_ratio", name, err)
		}
	}
	// A stored anchored curve resolves as it is (the gateway then anchors it).
	cal, ref, err := Resolve("cam-anchored", 0, 0, func(string, uint32) (string, uint32, error) { return anchoredYAML, 1, nil })
	if err != nil || ref != "cam-anchored@v1" {
		t.Fatalf("Resolve: %v %q", err, ref)
	}
	if _, err := estimator.NewAnchor(cal); err != nil {
		t.Fatalf("NewAnchor on the resolved curve: %v", err)
	}
	// An old file without input keeps its meaning.
	old, err := Parse([]byte(strings.Split(anchoredYAML, "input:")[0]))
	if err != nil || old.Anchored() || old.AnchorSpec().LengthS != 0 {
		t.Fatalf("old file: %v anchored=%v", err, old.Anchored())
	}
	if _, err := estimator.New(estimator.Config{SampleRateHz: 100, Calibration: old}); err != nil {
		t.Fatalf("old curve refused: %v", err)
	}
}

func TestAnchoredCurveFieldErrors(t *testing.T) {
	base := strings.Split(anchoredYAML, "input:")[0]
	for _, c := range []struct{ extra, field string }{
		{"input: anchored\n", "input:"},
		{"input: anchored_ratio\nanchor_s: 0\nanchor_min_sqi: 0.5\nanchor_min_seconds: 10\n", "anchor_s:"},
		{"input: anchored_ratio\nanchor_s: 60\nanchor_min_seconds: 10\n", "anchor_min_sqi:"},
		{"input: anchored_ratio\nanchor_s: 60\nanchor_min_sqi: 0.5\nanchor_min_seconds: 61\n", "anchor_min_seconds:"},
		{"anchor_s: 60\n", "anchor_s/"},
		{"input: ratio\nanchor_min_sqi: 0.5\n", "anchor_s/"},
	} {
		_, err := Parse([]byte(base + c.extra))
		if err == nil || !strings.Contains(err.Error(), c.field) {
			t.Errorf("%q: %v, want an error naming %s", c.extra, err, c.field)
		}
	}
}
