package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/calibration"
)

// writeLinePairs writes noise-free pairs on SpO2 = 110 - 25 R (REFERENCES.md
// empirical line, common practice) for three subjects.
func writeLinePairs(t *testing.T) string {
	t.Helper()
	var b strings.Builder
	b.WriteString("ratio,reference_pct,subject\n")
	for s := 1; s <= 3; s++ {
		for i := 0; i < 30; i++ {
			r := 0.4 + 1.2*float64(i)/29 + 0.001*float64(s)
			fmt.Fprintf(&b, "%.6f,%.6f,bench-%d\n", r, 110-25*r, s)
		}
	}
	path := filepath.Join(t.TempDir(), "Proto B pairs.csv")
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

func runCmd(args ...string) (code int, stdout, stderr string) {
	var o, e bytes.Buffer
	code = run(context.Background(), args, stdio{in: strings.NewReader(""), out: &o, err: &e})
	return code, o.String(), e.String()
}

func TestCalibrateWritesCurveReportAndStats(t *testing.T) {
	pairs := writeLinePairs(t)
	dir := t.TempDir()
	out := filepath.Join(dir, "curve.yaml")
	report := filepath.Join(dir, "report")
	code, stdout, stderr := runCmd("calibrate", "--pairs", pairs, "--model", "linear", "--out", out,
		"--report", report, "--device-model", "proto-b")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	curve, err := calibration.Load(out)
	if err != nil {
		t.Fatal(err)
	}
	// Noise-free pairs on the empirical line come back as the line.
	if math.Abs(curve.Coefficients[0]-110) > 1e-6 || math.Abs(curve.Coefficients[1]+25) > 1e-6 {
		t.Errorf("coefficients %v, want [110 -25]", curve.Coefficients)
	}
	if curve.Name != "proto-b-pairs" || curve.DeviceModel != "proto-b" || curve.Version != 1 {
		t.Errorf("name %q device model %q version %d, want proto-b-pairs, proto-b, 1", curve.Name, curve.DeviceModel, curve.Version)
	}
	for _, want := range []string{"Arms %", "leave-one-subject-out", "bench-3", "mean predictor", "calibration file: " + out} {
		if !strings.Contains(stdout, want) {
			t.Errorf("stdout lacks %q:\n%s", want, stdout)
		}
	}
	for _, f := range []string{"curve.svg", "bland_altman.svg", "bland_altman_loso.svg", "report.html"} {
		if st, err := os.Stat(filepath.Join(report, f)); err != nil || st.Size() == 0 {
			t.Errorf("report file %s: %v", f, err)
		}
	}

	code, stdout, stderr = runCmd("calibrate", "--pairs", pairs, "--model", "quadratic", "--format", "json", "--name", "proto-b-q")
	if code != 0 {
		t.Fatalf("json: exit %d: %s", code, stderr)
	}
	var js struct {
		Curve struct{ Name string } `json:"curve"`
		LOSO  struct {
			Pooled struct {
				N       int     `json:"n"`
				ArmsPct float64 `json:"arms_pct"`
			} `json:"pooled"`
		} `json:"loso"`
	}
	if err := json.Unmarshal([]byte(stdout), &js); err != nil {
		t.Fatalf("stdout is not JSON: %v\n%s", err, stdout)
	}
	if js.Curve.Name != "proto-b-q" || js.LOSO.Pooled.N != 90 || js.LOSO.Pooled.ArmsPct > 1e-4 {
		t.Errorf("json: curve %q, loso n %d Arms %v; want proto-b-q, 90, ~0", js.Curve.Name, js.LOSO.Pooled.N, js.LOSO.Pooled.ArmsPct)
	}
}

func TestCalibrateUsageAndInputErrors(t *testing.T) {
	pairs := writeLinePairs(t)
	bad := filepath.Join(t.TempDir(), "bad.csv")
	if err := os.WriteFile(bad, []byte("ratio,reference_pct\n0.5,97\n0.6,abc\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"calibrate", "--help"}, 0, "--pairs"},
		{[]string{"calibrate", "--model", "linear"}, 2, "--pairs: required"},
		{[]string{"calibrate", "--pairs", pairs, "--model", "cubic"}, 2, `--model: "cubic", want linear or quadratic`},
		{[]string{"calibrate", "--pairs", pairs, "--model", "linear", "--format", "xml"}, 2, "--format"},
		{[]string{"calibrate", "--pairs", bad, "--model", "linear"}, 1, `line 3: reference_pct: "abc" is not a number`},
		{[]string{"calibrate", "--pairs", pairs, "--model", "linear", "--name", "Bad Name"}, 1, "name:"},
	} {
		code, stdout, stderr := runCmd(tc.args...)
		if code != tc.code || !strings.Contains(stdout+stderr, tc.want) {
			t.Errorf("%v: exit %d, output %q; want exit %d and %q", tc.args, code, stdout+stderr, tc.code, tc.want)
		}
	}
}
