package pairing

import (
	"fmt"
	"math"
	"slices"
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

// The choice made for a held-out subject cannot depend on that subject's
// data: replace subject 4's recordings by something else entirely (its
// reference turned upside down around 85 %, its blue and green channels
// swapped between hands and time-reversed) and the variant each chooser
// picks for the fold that holds out subject 4 is the same, while that
// subject's score changes (the replacement is real).
func TestCameraProtocolChoiceIgnoresHeldOutSubject(t *testing.T) {
	if testing.Short() {
		t.Skip("pairs eight real recordings 54 ways, twice")
	}
	recs := cameraRecordings(t)
	changed := make([]Recording, len(recs))
	for i, r := range recs {
		changed[i] = r
		if r.Subject != "subject-4" {
			continue
		}
		ref := make([]calibration.ReferenceSecond, len(r.Reference))
		for k, s := range r.Reference {
			ref[k] = calibration.ReferenceSecond{Second: s.Second, SpO2Pct: math.Min(100, math.Max(0, 170-s.SpO2Pct))}
		}
		ch := map[string][]float64{}
		for name, xs := range r.Channels {
			ys := slices.Clone(xs)
			slices.Reverse(ys)
			ch[name] = ys
		}
		ch["b"], ch["g"] = ch["g"], ch["b"]
		changed[i] = Recording{Subject: r.Subject, Channels: ch, Reference: ref}
	}
	fold := func(recs []Recording) (nested, tracking calibration.NestedFold) {
		st, err := NewStudy(recs, protocolVariants, protocolOptions)
		if err != nil {
			t.Fatal(err)
		}
		n, err := st.Nested(calibration.Linear)
		if err != nil {
			t.Fatal(err)
		}
		r, err := st.With(calibration.Linear, st.TrackingChooser(60))
		if err != nil {
			t.Fatal(err)
		}
		return n.Folds[3], r.Folds[3]
	}
	n1, r1 := fold(recs)
	n2, r2 := fold(changed)
	if n1.Subject != "subject-4" || n2.Subject != "subject-4" {
		t.Fatalf("fold 4 holds out %s / %s", n1.Subject, n2.Subject)
	}
	if n1.Chosen != n2.Chosen || r1.Chosen != r2.Chosen {
		t.Errorf("held-out subject 4 changed the choice: nested %q -> %q, tracking %q -> %q", n1.Chosen, n2.Chosen, r1.Chosen, r2.Chosen)
	}
	if n1.Fit.MAEPct == n2.Fit.MAEPct && n1.Fit.N == n2.Fit.N {
		t.Errorf("subject 4's score did not change (MAE %.3f, n %d): the replacement did not reach the study", n1.Fit.MAEPct, n1.Fit.N)
	}
	t.Logf("fold subject-4: nested chose %s (MAE %.2f real, %.2f replaced); tracking chose %s", n1.Chosen, n1.Fit.MAEPct, n2.Fit.MAEPct, r1.Chosen)
}
