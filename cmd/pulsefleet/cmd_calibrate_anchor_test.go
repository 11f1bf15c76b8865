package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// calibrate pairs --anchor writes pairs of R/R0 that say so; calibrate fits
// a curve on them that says so; estimate, a raw-ratio consumer, refuses
// that curve naming the field; and an anchored pairs file is not taken for
// raw pairs.
func TestCalibrateAnchoredCurve(t *testing.T) {
	dir := t.TempDir()
	pairs, curve := filepath.Join(dir, "pairs.csv"), filepath.Join(dir, "curve.yaml")
	var args []string
	for _, s := range []string{"subject-2", "subject-4"} {
		sub := filepath.Join(filepath.Dir(cameraSubject2), s)
		args = append(args, "--raw", filepath.Join(sub, "ppg_left.csv"), "--reference", filepath.Join(sub, "reference.csv"), "--subject", s)
	}
	code, _, stderr := runCmd(append([]string{"calibrate", "pairs", "--rate", "30", "--red-col", "b", "--ir-col", "g", "--lag", "10",
		"--anchor", "60", "--out", pairs}, args...)...)
	if code != 0 {
		t.Fatalf("calibrate pairs --anchor: exit %d: %s", code, stderr)
	}
	b, _ := os.ReadFile(pairs)
	if !strings.HasPrefix(string(b), "# anchor: anchor_s=60 anchor_min_sqi=0.5 anchor_min_seconds=10\n") || !strings.Contains(string(b), "\nanchored_ratio,reference_pct,subject") {
		t.Fatalf("anchored pairs file:\n%.400s", b)
	}
	code, stdout, stderr := runCmd("calibrate", "--pairs", pairs, "--model", "linear", "--name", "cam-a", "--out", curve)
	if code != 0 || !strings.Contains(stdout, "input: anchored ratio R/R0") {
		t.Fatalf("calibrate on anchored pairs: exit %d: %s\n%s", code, stderr, stdout)
	}
	c, err := calibration.Load(curve)
	if err != nil {
		t.Fatal(err)
	}
	if !c.Anchored() || c.AnchorS != 60 || c.AnchorMinSQI != 0.5 || c.AnchorMinSec != 10 {
		t.Fatalf("curve: input %q anchor_s %d min_sqi %v min_seconds %d, want anchored_ratio 60 0.5 10", c.Input, c.AnchorS, c.AnchorMinSQI, c.AnchorMinSec)
	}
	// A raw-ratio consumer refuses it, naming the field.
	code, _, stderr = runCmd("estimate", "--in", cameraSubject2+"/ppg_left.csv", "--rate", "30", "--red-col", "b", "--ir-col", "g", "--calibration", curve)
	if code == 0 || !strings.Contains(stderr, "input: anchored_ratio") {
		t.Fatalf("estimate with an anchored curve: exit %d, stderr %q; want a refusal naming input: anchored_ratio", code, stderr)
	}
	// Anchored pairs without their anchor line are refused, not fitted as R.
	bad := filepath.Join(dir, "bad.csv")
	if err := os.WriteFile(bad, []byte(strings.SplitN(string(b), "\n", 2)[1]), 0o644); err != nil {
		t.Fatal(err)
	}
	if code, _, stderr := runCmd("calibrate", "--pairs", bad, "--model", "linear"); code == 0 || !strings.Contains(stderr, "anchored_ratio") {
		t.Fatalf("anchored pairs without the anchor line: exit %d: %s", code, stderr)
	}
	if code, _, stderr := runCmd("calibrate", "pairs", "--rate", "30", "--anchor", "60", "--min-sqi", "0.2", "--raw", "x", "--reference", "y"); code != 2 || !strings.Contains(stderr, "anchor_min_sqi") {
		t.Fatalf("--anchor with --min-sqi 0.2: exit %d: %s", code, stderr)
	}
}
