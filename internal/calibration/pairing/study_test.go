package pairing

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
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

// cameraStudyVariants is the candidate set of the camera study, fixed
// before the nested and rule evaluations: every pair of the three colours,
// every ratio method, and reference lags 0-30 s in 5 s steps (the reference oximeters
// average over several seconds; which lag fits is left to the training
// subjects).
var cameraStudyVariants = Variants(
	[][2]string{{"r", "g"}, {"b", "g"}, {"r", "b"}},
	estimator.RatioMethods,
	[]int{0, 5, 10, 15, 20, 25, 30},
)

// cameraStudyOptions: Align's defaults (30 s stable windows) with quality
// weights: pairs carry the window's SQI-weighted ratio and weight.
var cameraStudyOptions = Options{RateHz: 30, Align: calibration.AlignOptions{QualityWeights: true}}

func logNested(t *testing.T, what string, n *calibration.Nested) {
	t.Helper()
	for _, f := range n.Folds {
		t.Logf("%s: held out %s: chose %-26s (%s); n=%2d fit MAE %.2f Arms %.2f bias %+.2f; mean MAE %.2f Arms %.2f",
			what, f.Subject, f.Chosen, f.Why, f.Fit.N, f.Fit.MAEPct, f.Fit.ArmsPct, f.Fit.BiasPct, f.Baseline.MAEPct, f.Baseline.ArmsPct)
	}
	t.Logf("%s: pooled n=%d: fit MAE %.2f Arms %.2f bias %+.2f; mean predictor MAE %.2f Arms %.2f; MAE %.1f %% lower (published deep-learning MAE %.2f %%)",
		what, n.Pooled.N, n.Pooled.MAEPct, n.Pooled.ArmsPct, n.Pooled.BiasPct, n.Baseline.MAEPct, n.Baseline.ArmsPct, 100*n.Improvement(), publishedMAEPct)
}

// The protocol (README "Calibrating prototypes"), ways of
// choosing without looking at the held-out subject:
//
//   - nested: in each outer fold the variant (channels, ratio method, lag)
//     with the lowest leave-one-subject-out MAE on the other three subjects;
//   - rule: a ratio method fixed beforehand, the channel pair whose ratio is
//     usable on most training seconds, the lag at which the ratio tracks the
//     reference best within the training recordings; logged for each ratio
//     method.
//
// Then a linear curve is fitted on the training subjects and scored on the
// held-out one beside the mean predictor. Goal of the issue: pooled MAE at
// least 15 % below the mean predictor's. Measured (README): nested 3.7 %
// above it (worse, subject 1 withheld), the rule 13.2 % below with the
// derivative ratio, 4.4 % with the beat slope and 1.9 % with the spectral
// ratio. The derivative ratio was fixed after the camera data had been seen,
// so 13.2 % is not a blind result. The assertion is the measured floor of
// that figure with a margin, so that the suite shows the result and fails
// if it gets worse; it is not the goal.
func TestCameraNestedLeaveOneSubjectOut(t *testing.T) {
	recs := cameraRecordings(t)
	st, err := NewStudy(recs, cameraStudyVariants, cameraStudyOptions)
	if err != nil {
		t.Fatal(err)
	}
	for i, c := range st.Candidates {
		l, err := calibration.LeaveOneSubjectOut(c.Pairs, calibration.Linear)
		if err != nil {
			t.Logf("%-26s %s; no LOSO: %v", c.Name, st.Reports[i], err)
			continue
		}
		t.Logf("%-26s %3d pairs from %d subjects; plain LOSO MAE %.2f vs mean %.2f %% (chosen after the fact: optimistic)", c.Name, l.Pooled.N, len(l.Subjects), l.Pooled.MAEPct, l.Baseline.MAEPct)
	}
	nested, err := calibration.NestedLeaveOneSubjectOut(st.Candidates, calibration.Linear)
	if err != nil {
		t.Fatal(err)
	}
	logNested(t, "nested", nested)
	rule, err := calibration.LeaveOneSubjectOutWith(st.Candidates, calibration.Linear, st.RuleChooser(estimator.RatioDerivativeSlope))
	if err != nil {
		t.Fatal(err)
	}
	logNested(t, "rule", rule)
	for _, m := range []estimator.RatioMethod{estimator.RatioSpectral, estimator.RatioBeatSlope} {
		r, err := calibration.LeaveOneSubjectOutWith(st.Candidates, calibration.Linear, st.RuleChooser(m))
		if err != nil {
			t.Fatal(err)
		}
		logNested(t, "rule with "+string(m), r)
	}
	for _, n := range []*calibration.Nested{nested, rule} {
		if len(n.Folds) != len(cameraSubjects) {
			t.Errorf("%d folds, want %d", len(n.Folds), len(cameraSubjects))
		}
	}
	if !(rule.Improvement() >= 0.10) {
		t.Errorf("rule LOSO MAE %.2f %% vs mean predictor %.2f %%: %.1f %% lower, want >= 10 %% (measured about 13 %%)",
			rule.Pooled.MAEPct, rule.Baseline.MAEPct, 100*rule.Improvement())
	}
}
