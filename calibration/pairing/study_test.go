package pairing

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/pulsefleet/pulsefleet/calibration"
	"github.com/pulsefleet/pulsefleet/estimator"
)

// cameraRecordings reads both hands of every subject once.
func cameraRecordings(t testing.TB) []Recording {
	t.Helper()
	var recs []Recording
	for _, sub := range cameraSubjects {
		f, err := os.Open(filepath.Join(cameraDir, sub, "reference.csv"))
		if err != nil {
			t.Fatal(err)
		}
		ref, err := ReadReference(f, "")
		f.Close()
		if err != nil {
			t.Fatal(err)
		}
		for _, hand := range []string{"ppg_left.csv", "ppg_right.csv"} {
			f, err := os.Open(filepath.Join(cameraDir, sub, hand))
			if err != nil {
				t.Fatal(err)
			}
			ch, err := ReadChannels(f, []string{"r", "g", "b"})
			f.Close()
			if err != nil {
				t.Fatalf("%s/%s: %v", sub, hand, err)
			}
			recs = append(recs, Recording{Subject: sub, Channels: ch, Reference: ref})
		}
	}
	return recs
}

// CameraStudyVariants is the candidate set of the camera study, fixed
// before the nested evaluation: every pair of the three colours, both
// ratio methods, and reference lags 0, 10 and 20 s (the reference
// oximeters average over several seconds; which lag fits is left to the
// training subjects).
var cameraStudyVariants = Variants(
	[][2]string{{"r", "g"}, {"b", "g"}, {"r", "b"}},
	estimator.RatioMethods,
	[]int{0, 10, 20},
)

// The protocol (docs in README "Calibrating prototypes"): in each
// outer fold the variant (channels, ratio method, lag) is chosen by
// leave-one-subject-out on the other three subjects alone, then a linear
// curve is fitted on them and scored on the held-out subject beside the
// mean predictor. Goal of the issue: pooled MAE at least 15 % below the
// mean predictor's; measured (README): about 5-6 % below. The assertion
// is the measured floor with a margin, not the goal, so that the suite
// shows the honest result and fails if it gets worse.
func TestCameraNestedLeaveOneSubjectOut(t *testing.T) {
	recs := cameraRecordings(t)
	cands, reps, err := Candidates(recs, cameraStudyVariants, Options{RateHz: 30})
	if err != nil {
		t.Fatal(err)
	}
	for i, c := range cands {
		l, err := calibration.LeaveOneSubjectOut(c.Pairs, calibration.Linear)
		if err != nil {
			t.Logf("%-26s %s; no LOSO: %v", c.Name, reps[i], err)
			continue
		}
		t.Logf("%-26s %3d pairs from %d subjects; plain LOSO MAE %.2f vs mean %.2f %%", c.Name, l.Pooled.N, len(l.Subjects), l.Pooled.MAEPct, l.Baseline.MAEPct)
	}
	n, err := calibration.NestedLeaveOneSubjectOut(cands, calibration.Linear)
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range n.Folds {
		t.Logf("held out %s: chose %-26s (inner MAE %.2f %%); n=%2d fit MAE %.2f Arms %.2f bias %+.2f; mean MAE %.2f Arms %.2f",
			f.Subject, f.Chosen, f.InnerMAEPct, f.Fit.N, f.Fit.MAEPct, f.Fit.ArmsPct, f.Fit.BiasPct, f.Baseline.MAEPct, f.Baseline.ArmsPct)
	}
	t.Logf("nested pooled n=%d: fit MAE %.2f Arms %.2f bias %+.2f; mean predictor MAE %.2f Arms %.2f; MAE %.1f %% lower (published deep-learning MAE %.2f %%)",
		n.Pooled.N, n.Pooled.MAEPct, n.Pooled.ArmsPct, n.Pooled.BiasPct, n.Baseline.MAEPct, n.Baseline.ArmsPct, 100*n.Improvement(), publishedMAEPct)
	if len(n.Folds) != len(cameraSubjects) {
		t.Errorf("%d folds, want %d", len(n.Folds), len(cameraSubjects))
	}
	if !(n.Improvement() >= 0.03) {
		t.Errorf("nested LOSO MAE %.2f %% vs mean predictor %.2f %%: %.1f %% lower, want >= 3 %% (measured 5-6 %%)",
			n.Pooled.MAEPct, n.Baseline.MAEPct, 100*n.Improvement())
	}
}
