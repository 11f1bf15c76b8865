package estimator

import (
	"fmt"
	"math"

	"github.com/pulsefleet/pulsefleet/internal/stats"
)

// Bounds of AnchorSpec.
const (
	MaxAnchorS = 3600 // longest anchor, s
	// AnchorResetOffS is how many consecutive sensor-off seconds end an
	// anchor: the probe was off long enough to be put on someone else, so the
	// next usable second starts a new anchor.
	AnchorResetOffS = 30
)

// AnchorSpec says how a room-air anchor R0 is taken: the median of the
// usable per-second ratios (SQI >= MinSQI) over LengthS seconds of device
// time counted from the first usable second; fewer than MinSeconds usable
// seconds in that span and the anchor starts over at the next usable
// second. LengthS 0 means the calibration's input is the raw ratio R.
type AnchorSpec struct {
	LengthS    int
	MinSQI     float64
	MinSeconds int
}

// Validate checks an anchored spec (LengthS > 0) and names the field out
// of bounds.
func (a AnchorSpec) Validate() error {
	switch {
	case a.LengthS < 1 || a.LengthS > MaxAnchorS:
		return fmt.Errorf("anchor_s: %d, want 1..%d", a.LengthS, MaxAnchorS)
	case !(a.MinSQI > minSQIForRatio-1e-12 && a.MinSQI <= 1):
		return fmt.Errorf("anchor_min_sqi: %v, want %v..1 (the estimator gives no ratio below %v)", a.MinSQI, minSQIForRatio, minSQIForRatio)
	case a.MinSeconds < 1 || a.MinSeconds > a.LengthS:
		return fmt.Errorf("anchor_min_seconds: %d, want 1..anchor_s (%d)", a.MinSeconds, a.LengthS)
	}
	return nil
}

// AnchoredInput is implemented by a calibration that says what its input
// is. A calibration whose AnchorSpec has LengthS > 0 maps the anchored
// ratio R/R0, not R: a Stream refuses it (Config.Validate) and only an
// Anchor applies it.
type AnchoredInput interface {
	AnchorSpec() AnchorSpec
}

// anchorOf returns the anchor a calibration needs (LengthS 0: none).
func anchorOf(c Calibration) AnchorSpec {
	if a, ok := c.(AnchoredInput); ok {
		return a.AnchorSpec()
	}
	return AnchorSpec{}
}

// NoCalibration withholds SpO2 for every ratio: for a stream whose SpO2 an
// Anchor sets afterwards.
func NoCalibration() Calibration { return noCalibration{} }

type noCalibration struct{}

func (noCalibration) SpO2(float64) (float64, bool) { return math.NaN(), false }
func (noCalibration) String() string               { return "none (anchored curve applied after)" }

// Anchor applies a calibration on the anchored ratio to one device's
// estimates: until its room-air anchor R0 is complete every SpO2 is
// withheld and FlagAnchoring set; afterwards SpO2 = curve(R / R0). It keys
// on device time, not on the stream's Second, so it carries across
// Timeline restarts (a gap or reconnect of the same wear); make a new Anchor
// for a new wear (person, session). Pure and not safe for concurrent use;
// Apply does not allocate.
type Anchor struct {
	cal     Calibration
	spec    AnchorSpec
	rs      []float64 // usable ratios of the anchor in progress
	startMS int64     // TimeMS of the first usable second; 0: not started
	lastMS  int64     // TimeMS of the last estimate applied
	r0      float64   // NaN until complete
	offRun  int       // consecutive sensor-off seconds
	starts  int
}

// NewAnchor returns an anchor for cal, whose AnchorSpec must be anchored
// and valid.
func NewAnchor(cal Calibration) (*Anchor, error) {
	spec := anchorOf(cal)
	if spec.LengthS == 0 {
		return nil, fmt.Errorf("anchor: the calibration's input is the raw ratio (no anchor_s); use it in Config.Calibration")
	}
	if err := spec.Validate(); err != nil {
		return nil, fmt.Errorf("anchor: %w", err)
	}
	return &Anchor{cal: cal, spec: spec, rs: make([]float64, 0, 2*spec.LengthS+2), r0: math.NaN()}, nil
}

// Spec returns the anchor's spec.
func (a *Anchor) Spec() AnchorSpec { return a.spec }

// R0 returns the anchor (ok false while it is in progress).
func (a *Anchor) R0() (r0 float64, ok bool) { return a.r0, !math.IsNaN(a.r0) }

// Starts counts the anchors begun (the first, and each start over).
func (a *Anchor) Starts() int { return a.starts }

// Progress returns the seconds of device time the anchor in progress has
// covered (0 before its first usable second) and its usable seconds.
func (a *Anchor) Progress() (elapsedS, usable int) {
	if a.startMS == 0 {
		return 0, 0
	}
	return int((a.lastMS-a.startMS)/1000) + 1, len(a.rs)
}

// Status says in words why SpO2 is withheld, or "" when the anchor is
// complete: "calibration anchor in progress, N s of A".
func (a *Anchor) Status() string {
	if _, ok := a.R0(); ok {
		return ""
	}
	n, _ := a.Progress()
	return fmt.Sprintf("calibration anchor in progress, %d s of %d", n, a.spec.LengthS)
}

func (a *Anchor) usable(e *TimedEstimate) bool {
	return e.Ratio > 0 && !math.IsInf(e.Ratio, 0) && e.SQI >= a.spec.MinSQI
}

// restart drops the anchor in progress or complete.
func (a *Anchor) restart() {
	a.rs, a.startMS, a.r0 = a.rs[:0], 0, math.NaN()
}

// Apply sets e's SpO2 from the anchored ratio, or withholds it with
// FlagAnchoring while the anchor is in progress. Estimates must come in
// device-time order; one earlier than the anchor's start (a device clock
// reset) starts the anchor over; one at or before the latest applied (a
// resend after a reconnect) is not counted in the anchor twice.
func (a *Anchor) Apply(e *TimedEstimate) {
	e.SpO2Pct = math.NaN()
	if e.Flags.Has(FlagSensorOff) {
		if a.offRun++; a.offRun >= AnchorResetOffS {
			a.restart()
		}
	} else {
		a.offRun = 0
	}
	if a.startMS != 0 && e.TimeMS < a.startMS {
		a.restart() // the device clock went back
	}
	resent := a.lastMS != 0 && e.TimeMS <= a.lastMS && a.startMS != 0
	a.lastMS = max(a.lastMS, e.TimeMS)
	if r0, ok := a.R0(); ok {
		if !math.IsNaN(e.Ratio) {
			if v, ok := a.cal.SpO2(e.Ratio / r0); ok {
				e.SpO2Pct = v
			}
		}
		return
	}
	if a.startMS == 0 {
		if !a.usable(e) {
			e.Flags |= FlagAnchoring
			return
		}
		a.startMS = e.TimeMS
		a.starts++
	}
	end := a.startMS + int64(a.spec.LengthS)*1000
	if e.TimeMS < end {
		// A second resent after a reconnect is in the anchor already.
		if !resent && a.usable(e) && len(a.rs) < cap(a.rs) {
			a.rs = append(a.rs, e.Ratio)
		}
		e.Flags |= FlagAnchoring
		return
	}
	// The span is over: this second is the first after it.
	if len(a.rs) < a.spec.MinSeconds {
		a.restart()
		e.Flags |= FlagAnchoring
		if a.usable(e) {
			a.startMS = e.TimeMS
			a.starts++
			a.rs = append(a.rs, e.Ratio)
		}
		return
	}
	a.r0 = stats.Median(a.rs) // sorts in place: no allocation
	a.Apply(e)
}
