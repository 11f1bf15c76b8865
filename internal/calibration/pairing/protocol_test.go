package pairing

import (
	"fmt"
	"testing"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// protocolVariants is the candidate set of docs/calibration-protocol.md,
// version 1: 3 channel pairs x 3 ratio methods x lags 0, 10, 20 s x room-air
// anchors of 60 and 120 s (54 variants).
var protocolVariants = AnchoredVariants(
	[][2]string{{"r", "g"}, {"b", "g"}, {"r", "b"}},
	[]estimator.RatioMethod{estimator.RatioBeatSlope, estimator.RatioDerivativeSlope, estimator.RatioSpectral},
	[]int{0, 10, 20},
	[]int{60, 120},
)

// protocolOptions are the protocol's fixed settings: Align's defaults (30 s
// windows, 2 % spread, MinSQI 0.5) with quality weights.
var protocolOptions = Options{RateHz: 30, Align: calibration.AlignOptions{QualityWeights: true}}

// TestCameraAnchoredProtocol runs the pre-registered protocol: the primary
// evaluation (nested leave-one-subject-out over the 54 anchored variants)
// and the secondary one (the tracking rule over the 60 s anchored
// variants), each over all four recorded subjects and scored beside the
// mean predictor. Version 1 anchors at the recording's start; version 2 at
// its first usable second.
func TestCameraAnchoredProtocol(t *testing.T) {
	if testing.Short() {
		t.Skip("reads and pairs eight real recordings 54 ways")
	}
	recs := cameraRecordings(t)
	for _, version := range []int{1, 2} {
		o := protocolOptions
		o.AnchorAtRecordingStart = version == 1
		st, err := NewStudy(recs, protocolVariants, o)
		if err != nil {
			t.Fatal(err)
		}
		what := fmt.Sprintf("version %d", version)
		for i, c := range st.Candidates {
			t.Logf("%s: %-34s %s", what, c.Name, st.Reports[i])
		}
		primary, err := st.Nested(calibration.Linear)
		if version == 1 {
			// Subject 1 has no usable ratio in its first 120 s: no variant
			// gives every training subject pairs where it trains.
			if err == nil {
				t.Errorf("%s: primary evaluated; want no candidate in the folds training on subject 1 (recorded result)", what)
			}
			t.Logf("%s: primary (nested): %v", what, err)
		} else {
			if err != nil {
				t.Fatalf("%s: primary: %v", what, err)
			}
			logNested(t, what+": primary (nested)", primary)
			// The target as the protocol states it: four subjects
			// scored, pooled MAE >= 15 % below the mean predictor's
			// (measured 15.4 %: a small change can lose it, and then this
			// says so).
			for _, f := range primary.Folds {
				if f.Withheld {
					t.Errorf("%s: %s withheld", what, f.Subject)
				}
			}
			if !(primary.Improvement() >= 0.15) {
				t.Errorf("%s: pooled MAE %.2f %% vs mean predictor %.2f %%: %.1f %% lower, target >= 15 %%", what, primary.Pooled.MAEPct, primary.Baseline.MAEPct, 100*primary.Improvement())
			}
		}
		secondary, err := st.With(calibration.Linear, st.TrackingChooser(60))
		if err != nil {
			t.Logf("%s: secondary (tracking, anchor 60 s): %v", what, err)
		} else {
			logNested(t, what+": secondary (tracking, anchor 60 s)", secondary)
		}
	}
}
