package pairing

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// cameraDir holds the open camera-oximetry recordings (Hoffman et al., npj
// Digit. Med. 5, 146 (2022), MIT licence; README and LICENSE beside them).
const cameraDir = "../../../testdata/camera-oximetry"

var cameraSubjects = []string{"subject-1", "subject-2", "subject-3", "subject-4"}

// cameraPairs pairs both hands of every subject; the person is the
// subject, so leave-one-subject-out holds out both hands together.
func cameraPairs(t testing.TB, o Options) ([]calibration.Pair, calibration.AlignReport) {
	t.Helper()
	var all []calibration.Pair
	var rep calibration.AlignReport
	for _, sub := range cameraSubjects {
		for _, hand := range []string{"ppg_left.csv", "ppg_right.csv"} {
			raw, err := os.Open(filepath.Join(cameraDir, sub, hand))
			if err != nil {
				t.Fatal(err)
			}
			ref, err := os.Open(filepath.Join(cameraDir, sub, "reference.csv"))
			if err != nil {
				t.Fatal(err)
			}
			o.Align.Subject = sub
			p, r, err := FromRecording(raw, ref, o)
			raw.Close()
			ref.Close()
			if err != nil {
				t.Fatalf("%s/%s: %v", sub, hand, err)
			}
			t.Logf("%s %s: %s", sub, hand, r)
			all = append(all, p...)
			rep.Add(r)
		}
	}
	return all, rep
}

// cameraOptions are the defaults of calibration.Align with the camera's
// channels: r as the long wavelength (first channel) and g as the second,
// the colour with the strongest pulsatile signal in these recordings.
var cameraOptions = Options{RateHz: 30, RedCol: "r", IRCol: "g"}

// Published result on the same study (docs/references.md Open data, seen):
// deep-learning model, MAE 5.00 % SpO2 (Hoffman et al. 2022, 6 subjects,
// their own protocol, so a reference point, not a like-for-like score).
const publishedMAEPct = 5.00

func TestCameraLeaveOneSubjectOutBeatsMeanPredictor(t *testing.T) {
	pairs, rep := cameraPairs(t, cameraOptions)
	t.Logf("pairing: %s", rep)
	if rep.Kept < 60 {
		t.Fatalf("only %d pairs from 8 recordings of 13-19 min: %s", rep.Kept, rep)
	}
	for _, model := range []string{calibration.Linear, calibration.Quadratic} {
		l, err := calibration.LeaveOneSubjectOut(pairs, model)
		if err != nil {
			t.Fatal(err)
		}
		t.Logf("%s, leave-one-subject-out (held-out subject: fit MAE/Arms, mean predictor MAE/Arms):", model)
		for _, s := range l.Subjects {
			t.Logf("  %s  n=%3d  fit %.2f / %.2f %%   mean %.2f / %.2f %%", s.Subject, s.Fit.N, s.Fit.MAEPct, s.Fit.ArmsPct, s.Baseline.MAEPct, s.Baseline.ArmsPct)
		}
		t.Logf("  pooled     n=%3d  fit %.2f / %.2f %%   mean %.2f / %.2f %%   (published deep-learning MAE %.2f %%)",
			l.Pooled.N, l.Pooled.MAEPct, l.Pooled.ArmsPct, l.Baseline.MAEPct, l.Baseline.ArmsPct, publishedMAEPct)
		if model != calibration.Linear {
			continue
		}
		// The point of a calibration: on people it was not fitted to, it must
		// do better than knowing only the training subjects' mean saturation.
		if !(l.Pooled.MAEPct < l.Baseline.MAEPct && l.Pooled.ArmsPct < l.Baseline.ArmsPct) {
			t.Errorf("linear LOSO MAE %.2f %%, Arms %.2f %%; mean predictor %.2f %%, %.2f %%: the calibration does not beat the mean",
				l.Pooled.MAEPct, l.Pooled.ArmsPct, l.Baseline.MAEPct, l.Baseline.ArmsPct)
		}
		// Aim of the issue: MAE <= 6 %; the study's own deep model reached 5.00 %.
		if l.Pooled.MAEPct > 6 {
			t.Errorf("linear LOSO MAE %.2f %%, want <= 6 %% (published deep-learning result %.2f %%)", l.Pooled.MAEPct, publishedMAEPct)
		}
	}
}
