package main

import (
	"encoding/json"
	"fmt"
	"os"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// cameraDir is the camera-oximetry open data (Hoffman et al., npj Digit.
// Med. 5, 146 (2022), MIT licence; docs/references.md "Open data").
const cameraDir = "../../testdata/camera-oximetry"

func cameraStudyArgs() []string {
	args := []string{"calibrate", "study", "--rate", "30", "--channels", "r/g,b/g", "--lags", "0,10"}
	for s := 1; s <= 4; s++ {
		for _, h := range []string{"left", "right"} {
			args = append(args, "--raw", fmt.Sprintf("%s/subject-%d/ppg_%s.csv", cameraDir, s, h),
				"--reference", fmt.Sprintf("%s/subject-%d/reference.csv", cameraDir, s))
		}
	}
	return args
}

// The study prints, for both ways of choosing, every held-out subject's
// choice and scores beside the mean predictor, the pooled rows and the
// caution; the figures themselves are checked in internal/calibration/pairing.
func TestCalibrateStudyReportsBothChoosers(t *testing.T) {
	code, stdout, stderr := runCmd(cameraStudyArgs()...)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	for _, want := range []string{
		"8 recordings of 4 subjects, 12 variants",
		"nested: variant with the lowest inner leave-one-subject-out MAE",
		"rule: ratio derivative fixed beforehand",
		"subject-1: chose ", "subject-4: chose ",
		"mean predictor MAE / Arms %", "  pooled", "lower than the mean predictor's",
		"on all subjects: nested picks ", caution.Line,
	} {
		if !strings.Contains(stdout, want) {
			t.Errorf("study output lacks %q:\n%s", want, stdout)
		}
	}
	code, stdout, stderr = runCmd(append(cameraStudyArgs(), "--format", "json")...)
	if code != 0 {
		t.Fatalf("json: exit %d: %s", code, stderr)
	}
	var v struct {
		Caution string `json:"caution"`
		Rule    struct {
			Folds  []struct{ Subject, Chosen string } `json:"folds"`
			Pooled struct {
				N int `json:"n"`
			} `json:"pooled"`
			Improvement float64 `json:"improvement"`
		} `json:"rule"`
		Tracking struct {
			Folds []struct{ Subject, Chosen string } `json:"folds"`
		} `json:"tracking"`
	}
	if err := json.Unmarshal([]byte(stdout), &v); err != nil {
		t.Fatalf("json: %v\n%s", err, stdout)
	}
	if v.Caution != caution.Text || len(v.Rule.Folds) != 4 || v.Rule.Pooled.N < 100 {
		t.Errorf("json: caution %q, %d rule folds, pooled n %d; want the caution, 4 folds, >= 100 pairs", v.Caution, len(v.Rule.Folds), v.Rule.Pooled.N)
	}
	if len(v.Tracking.Folds) != 4 {
		t.Errorf("json: %d tracking folds, want 4", len(v.Tracking.Folds))
	}
}

func TestCalibrateStudyUsage(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"calibrate", "study", "--reference", "r.csv", "--rate", "30"}, "--raw: required"},
		{[]string{"calibrate", "study", "--raw", "a.csv", "--reference", "r.csv", "--rate", "30", "--channels", "r-g"}, "--channels: \"r-g\""},
		{[]string{"calibrate", "study", "--raw", "a.csv", "--reference", "r.csv", "--rate", "30", "--ratios", "peak"}, "--ratios"},
		{[]string{"calibrate", "study", "--raw", "a.csv", "--reference", "r.csv", "--rate", "30", "--lags", "0,x"}, "--lags: \"x\""},
		{[]string{"calibrate", "study", "--raw", "a.csv", "--reference", "r.csv", "--rate", "30", "--ratios", "slope"}, "--rule-ratio"},
	} {
		code, _, stderr := runCmd(tc.args...)
		if code != 2 || !strings.Contains(stderr, tc.want) {
			t.Errorf("%v: exit %d, %q; want exit 2 and %q", tc.args, code, stderr, tc.want)
		}
	}
}

// calibrate pairs takes the study's pick: channels, ratio method, lag and
// quality weights; the weights land in the pairs file and calibrate reads
// them back.
func TestCalibratePairsWithRatioAndWeights(t *testing.T) {
	out := t.TempDir() + "/pairs.csv"
	code, _, stderr := runCmd("calibrate", "pairs", "--raw", cameraSubject2+"/ppg_left.csv", "--reference", cameraSubject2+"/reference.csv",
		"--rate", "30", "--red-col", "b", "--ir-col", "g", "--ratio", "derivative", "--lag", "10", "--quality-weights", "--out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	if f, err := os.ReadFile(out); err != nil || !strings.Contains(string(f), "\nratio,reference_pct,subject,weight\n") {
		t.Errorf("pairs file lacks the weight column (%v):\n%.300s", err, f)
	}
	code, stdout, stderr := runCmd("calibrate", "--pairs", out, "--model", "linear")
	if code != 0 || !strings.Contains(stdout, "fit (in sample)") {
		t.Fatalf("calibrate on the weighted pairs: exit %d: %s%s", code, stdout, stderr)
	}
	if code, _, stderr := runCmd("calibrate", "pairs", "--raw", "a.csv", "--reference", "r.csv", "--rate", "30", "--ratio", "fft"); code != 2 || !strings.Contains(stderr, `--ratio: "fft"`) {
		t.Errorf("--ratio fft: exit %d, %q; want exit 2 naming --ratio", code, stderr)
	}
}

// estimate takes the same ratio methods; on a real recording both give a
// ratio on most seconds, and not the same one.
func TestEstimateRatioMethod(t *testing.T) {
	ratios := map[string][]string{}
	for _, m := range []string{"slope", "derivative"} {
		code, stdout, stderr := runCmd("estimate", "--in", cameraSubject2+"/ppg_left.csv", "--red-col", "b", "--ir-col", "g",
			"--rate", "30", "--adc-bits", "0", "--ratio", m)
		if code != 0 {
			t.Fatalf("--ratio %s: exit %d: %s", m, code, stderr)
		}
		for _, line := range strings.Split(stdout, "\n") {
			f := strings.Split(line, ",")
			if len(f) >= 6 && f[5] != "" && f[5] != "ratio" {
				ratios[m] = append(ratios[m], f[5])
			}
		}
	}
	if len(ratios["slope"]) < 500 || len(ratios["derivative"]) < 500 {
		t.Errorf("ratios on %d (slope) and %d (derivative) seconds of 1121, want most", len(ratios["slope"]), len(ratios["derivative"]))
	}
	if strings.Join(ratios["slope"], ";") == strings.Join(ratios["derivative"], ";") {
		t.Error("--ratio derivative gave the same ratios as slope")
	}
	if code, _, stderr := runCmd("estimate", "--in", cameraSubject2+"/ppg_left.csv", "--rate", "30", "--ratio", "fft"); code != 2 || !strings.Contains(stderr, `--ratio: "fft"`) {
		t.Errorf("--ratio fft: exit %d, %q; want exit 2 naming --ratio", code, stderr)
	}
}

// With room-air anchors the study also reports the tracking chooser over
// every recorded subject; anchoring at the recording's start (protocol
// version 1) leaves subject 1 without an anchor, so no variant has pairs
// from every training subject and the command fails saying why.
func TestCalibrateStudyAnchors(t *testing.T) {
	args := []string{"calibrate", "study", "--rate", "30", "--channels", "b/g", "--lags", "10", "--anchors", "60"}
	for s := 1; s <= 4; s++ {
		for _, h := range []string{"left", "right"} {
			args = append(args, "--raw", fmt.Sprintf("%s/subject-%d/ppg_%s.csv", cameraDir, s, h),
				"--reference", fmt.Sprintf("%s/subject-%d/reference.csv", cameraDir, s))
		}
	}
	code, stdout, stderr := runCmd(args...)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	for _, want := range []string{
		"8 recordings of 4 subjects, 3 variants",
		"tracking: variant (anchor 60 s)", "subject-1: chose b/g slope lag 10 s anchor 60 s",
		"  pooled", "calibrate pairs --anchor A", caution.Line,
	} {
		if !strings.Contains(stdout, want) {
			t.Errorf("anchored study output lacks %q:\n%s", want, stdout)
		}
	}
	code, _, stderr = runCmd(append(args, "--anchor-at-start")...)
	if code != 1 || !strings.Contains(stderr, "no candidate has pairs from every other subject") {
		t.Errorf("--anchor-at-start: exit %d, %q; want exit 1 saying no candidate has pairs from every other subject", code, stderr)
	}
	code, _, stderr = runCmd(append(args, "--anchors", "60,-5")...)
	if code != 2 || !strings.Contains(stderr, `--anchors: "-5"`) {
		t.Errorf("--anchors -5: exit %d, %q; want exit 2 naming the value", code, stderr)
	}
}
