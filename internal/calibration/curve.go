package calibration

import (
	"errors"
	"fmt"
	"math"
	"os"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/caution"

	"go.yaml.in/yaml/v3"
)

// Curve is a fitted calibration: SpO2 (%) as a polynomial of the ratio of
// ratios R, valid on [RatioMin, RatioMax]. It satisfies estimator.Calibration
// without importing it.
//
// File format (YAML; JSON is valid YAML too):
//
//	name: proto-b-660-940        # identifier, [a-z0-9._-], 1..64 chars
//	version: 3                   # >= 1; a new fit of the same name bumps it
//	model: quadratic             # linear | quadratic
//	coefficients: [112.1, -24.9, -1.3]   # SpO2 = c0 + c1 R + c2 R^2 (c2 only for quadratic)
//	ratio_min: 0.35              # R outside [ratio_min, ratio_max] yields no value
//	ratio_max: 1.6
//	device_model: proto-b        # optional: the model it was fitted for
//	fitted_at: 2026-11-30T10:00:00Z   # optional
//	stats: {...}                 # optional: what calibrate measured (informational)
//	input: anchored_ratio        # optional: ratio (the default) | anchored_ratio
//	anchor_s: 60                 # anchored_ratio only: the room-air anchor's length, s
//	anchor_min_sqi: 0.5          # anchored_ratio only: SQI a second needs to count in the anchor
//	anchor_min_seconds: 10       # anchored_ratio only: usable seconds the anchor needs
//
// A curve with input anchored_ratio maps R/R0, where R0 is the median of the
// device's usable ratios over anchor_s seconds from its first usable second
// (the person at rest on room air, Anchor). It must never see a raw R: the
// estimator refuses it as Config.Calibration (it satisfies
// estimator.AnchoredInput), and only estimator.Anchor applies it. A file
// without input keeps its meaning (raw R).
type Curve struct {
	Name         string         `yaml:"name" json:"name"`
	Version      int            `yaml:"version" json:"version"`
	Model        string         `yaml:"model" json:"model"`
	Coefficients []float64      `yaml:"coefficients" json:"coefficients"`
	RatioMin     float64        `yaml:"ratio_min" json:"ratio_min"`
	RatioMax     float64        `yaml:"ratio_max" json:"ratio_max"`
	DeviceModel  string         `yaml:"device_model,omitempty" json:"device_model,omitempty"`
	FittedAt     string         `yaml:"fitted_at,omitempty" json:"fitted_at,omitempty"`
	Stats        map[string]any `yaml:"stats,omitempty" json:"stats,omitempty"`
	Input        string         `yaml:"input,omitempty" json:"input,omitempty"`
	AnchorS      int            `yaml:"anchor_s,omitempty" json:"anchor_s,omitempty"`
	AnchorMinSQI float64        `yaml:"anchor_min_sqi,omitempty" json:"anchor_min_sqi,omitempty"`
	AnchorMinSec int            `yaml:"anchor_min_seconds,omitempty" json:"anchor_min_seconds,omitempty"`
}

// Inputs of a curve.
const (
	InputRatio         = "ratio"          // the raw ratio of ratios R (also when input is absent)
	InputAnchoredRatio = "anchored_ratio" // R / R0, R0 the device's room-air anchor
)

// Anchored reports whether the curve's input is the anchored ratio.
func (c *Curve) Anchored() bool { return c.Input == InputAnchoredRatio }

// AnchorSpec says what anchor the curve's input needs (LengthS 0: none,
// the input is raw R). It makes the curve an estimator.AnchoredInput.
func (c *Curve) AnchorSpec() estimator.AnchorSpec {
	if !c.Anchored() {
		return estimator.AnchorSpec{}
	}
	return estimator.AnchorSpec{LengthS: c.AnchorS, MinSQI: c.AnchorMinSQI, MinSeconds: c.AnchorMinSec}
}

// String names the curve, for error messages.
func (c *Curve) String() string { return "curve " + c.CurveName() }

// CurveName returns the identifier used in logs and in the store.
func (c *Curve) CurveName() string { return fmt.Sprintf("%s@v%d", c.Name, c.Version) }

// SpO2 maps a ratio of ratios to saturation in percent. ok is false when R is
// not finite or outside the fitted range; the result is clamped to 0..100.
func (c *Curve) SpO2(r float64) (pct float64, ok bool) {
	if math.IsNaN(r) || math.IsInf(r, 0) || r < c.RatioMin || r > c.RatioMax {
		return math.NaN(), false
	}
	v := 0.0
	for i := len(c.Coefficients) - 1; i >= 0; i-- {
		v = v*r + c.Coefficients[i]
	}
	return math.Min(100, math.Max(0, v)), true
}

// Validate checks every field and names the first one out of bounds.
func (c *Curve) Validate() error {
	if n := len(c.Name); n < 1 || n > 64 {
		return fmt.Errorf("name: length %d, want 1..64", n)
	}
	for _, r := range c.Name {
		if !(r >= 'a' && r <= 'z' || r >= '0' && r <= '9' || r == '.' || r == '_' || r == '-') {
			return fmt.Errorf("name: %q has %q, want only a-z 0-9 . _ -", c.Name, r)
		}
	}
	if c.Version < 1 {
		return fmt.Errorf("version: %d, want >= 1", c.Version)
	}
	want := map[string]int{"linear": 2, "quadratic": 3}[c.Model]
	if want == 0 {
		return fmt.Errorf("model: %q, want linear or quadratic", c.Model)
	}
	if len(c.Coefficients) != want {
		return fmt.Errorf("coefficients: %d values for model %s, want %d", len(c.Coefficients), c.Model, want)
	}
	for i, v := range c.Coefficients {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("coefficients[%d]: %v, want a finite number", i, v)
		}
	}
	if !(c.RatioMin >= 0 && c.RatioMax > c.RatioMin && c.RatioMax <= 10) {
		return fmt.Errorf("ratio_min/ratio_max: [%v, %v], want 0 <= ratio_min < ratio_max <= 10", c.RatioMin, c.RatioMax)
	}
	switch c.Input {
	case "", InputRatio:
		if c.AnchorS != 0 || c.AnchorMinSQI != 0 || c.AnchorMinSec != 0 {
			return fmt.Errorf("anchor_s/anchor_min_sqi/anchor_min_seconds: set (%d, %v, %d) but input is %q; want input: %s with them, or none of them",
				c.AnchorS, c.AnchorMinSQI, c.AnchorMinSec, c.Input, InputAnchoredRatio)
		}
	case InputAnchoredRatio:
		if err := c.AnchorSpec().Validate(); err != nil {
			return err
		}
	default:
		return fmt.Errorf("input: %q, want %s (the default) or %s", c.Input, InputRatio, InputAnchoredRatio)
	}
	return nil
}

// Parse decodes and validates a calibration file's contents. Unknown keys
// are an error, so a misspelt key is not silently ignored.
func Parse(data []byte) (*Curve, error) {
	var c Curve
	dec := yaml.NewDecoder(bytesReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(&c); err != nil {
		return nil, fmt.Errorf("calibration: %w", err)
	}
	if err := c.Validate(); err != nil {
		return nil, fmt.Errorf("calibration: %w", err)
	}
	return &c, nil
}

// Load reads and validates a calibration file.
func Load(path string) (*Curve, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("calibration: %w", err)
	}
	c, err := Parse(data)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, errors.Unwrap(err))
	}
	return c, nil
}

// Marshal encodes the curve in the file format, after the caution as a YAML
// comment line (docs/contracts.md, "The caution on every output").
func (c *Curve) Marshal() ([]byte, error) {
	if err := c.Validate(); err != nil {
		return nil, fmt.Errorf("calibration: %w", err)
	}
	b, err := yaml.Marshal(c)
	if err != nil {
		return nil, err
	}
	return append([]byte(caution.Comment), b...), nil
}
