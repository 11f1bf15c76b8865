package estimator

import (
	"fmt"
	"math"
)

// Bounds and defaults of Config.
const (
	MinSampleRateHz   = 25.0   // below this the cardiac band (up to 5 Hz) is not sampled well enough
	MaxSampleRateHz   = 1000.0 // above this nothing is gained and the per-stream cost grows
	DefaultAveragingS = 8.0    // averaging window when Config.AveragingS is 0
	MinAveragingS     = 2.0
	MaxAveragingS     = 30.0
	MinADCBits        = 6
	MaxADCBits        = 24

	// MinResolvedCodes is the pulsatile swing, in ADC codes, below which
	// FlagLowResolution is raised: with a step of at most 1 % of the swing AC
	// is resolved to two significant digits. It matches the rule of thumb in
	// docs/references.md (AC ~2 % of DC near mid-range needs >= 14 bits:
	// 2^13 x 2 % = 164 codes passes, 12 bits gives 41 and fails; common
	// practice).
	MinResolvedCodes = 100.0
	// MinUsableCodes is the swing below which the ratio is withheld: fewer
	// than 10 codes do not give even one significant digit.
	MinUsableCodes = 10.0
)

// Config fixes a stream's sensor and processing parameters.
type Config struct {
	// SampleRateHz is samples per second per channel; required, 25..1000.
	SampleRateHz float64
	// ADCBits is the converter resolution, used for the clipping,
	// sensor-off and resolution checks. 0 = unknown (for example float
	// inputs such as camera frame means): those checks are skipped except
	// sensor-off at no light. Else 6..24.
	ADCBits int
	// Calibration maps the ratio of ratios to SpO2; nil = Empirical().
	Calibration Calibration
	// AveragingS is the window, in seconds, over which beats are combined
	// into each estimate; 0 = DefaultAveragingS (8 s), else 2..30.
	AveragingS float64
	// Ratio chooses how each beat's red/infrared slope is measured;
	// "" = RatioBeatSlope.
	Ratio RatioMethod
}

// Validate checks every field and names the first one out of bounds.
func (c Config) Validate() error {
	if math.IsNaN(c.SampleRateHz) || c.SampleRateHz < MinSampleRateHz || c.SampleRateHz > MaxSampleRateHz {
		return fmt.Errorf("SampleRateHz: %v Hz, want %v..%v Hz", c.SampleRateHz, MinSampleRateHz, MaxSampleRateHz)
	}
	if c.ADCBits != 0 && (c.ADCBits < MinADCBits || c.ADCBits > MaxADCBits) {
		return fmt.Errorf("ADCBits: %d, want 0 (unknown) or %d..%d", c.ADCBits, MinADCBits, MaxADCBits)
	}
	if c.AveragingS != 0 && (math.IsNaN(c.AveragingS) || c.AveragingS < MinAveragingS || c.AveragingS > MaxAveragingS) {
		return fmt.Errorf("AveragingS: %v s, want 0 (default %v s) or %v..%v s", c.AveragingS, DefaultAveragingS, MinAveragingS, MaxAveragingS)
	}
	if a := anchorOf(c.Calibration); a.LengthS != 0 {
		return fmt.Errorf("Calibration: %v has input: anchored_ratio (anchor_s: %d): it maps R/R0, and a stream gives the raw ratio R; it applies only through an Anchor (NewAnchor), never to R", c.Calibration, a.LengthS)
	}
	if c.Ratio != "" && c.Ratio != RatioBeatSlope && c.Ratio != RatioDerivativeSlope && c.Ratio != RatioSpectral {
		//lint:ignore ST1005 errors here start with the Config field they name
		return fmt.Errorf("Ratio: %q, want \"\" (default %s), %s, %s or %s", c.Ratio, RatioBeatSlope, RatioBeatSlope, RatioDerivativeSlope, RatioSpectral)
	}
	return nil
}

// RatioMethod names how a beat's ratio of ratios is measured (doc.go, step 5).
type RatioMethod string

// Ratio methods. Both take the least-squares slope of the first channel on
// the second over every sample of a beat (the ratio as a regression slope)
// and scale it by DC_second / DC_first.
const (
	// RatioBeatSlope regresses the band-passed channels: every sample
	// weighs by its distance from the beat's mean, so the slow systolic
	// swing dominates. The default.
	RatioBeatSlope RatioMethod = "slope"
	// RatioDerivativeSlope regresses the first differences of the
	// band-passed channels (a derivative-based ratio): the steep systolic
	// upstroke dominates and slow components the two channels do not share
	// (venous and respiratory residue, light drift inside the band) weigh
	// less. It is noisier at low perfusion, since differencing raises
	// wide-band noise relative to the pulse.
	RatioDerivativeSlope RatioMethod = "derivative"
	// RatioSpectral takes the ratio at the pulse frequency: the
	// cross-spectrum of the Hann-windowed band-passed channels over the
	// averaging window at the pulse rate and its second harmonic, divided by
	// the infrared power there (the least-squares slope restricted to the
	// pulse harmonics), times DC_second / DC_first over the window. Noise
	// between the harmonics does not enter. Beats still decide whether a
	// value is given (SQI); only the ratio's value comes from the spectrum.
	RatioSpectral RatioMethod = "spectral"
)

// RatioMethods lists the accepted methods.
var RatioMethods = []RatioMethod{RatioBeatSlope, RatioDerivativeSlope, RatioSpectral}
