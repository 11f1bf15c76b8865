package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// writeLinePairs writes noise-free pairs on SpO2 = 110 - 25 R (docs/references.md
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
	// Ratios span 0.401..1.603; the default margin widens that by 10 % of the span.
	if math.Abs(curve.RatioMin-(0.401-0.1202)) > 1e-6 || math.Abs(curve.RatioMax-(1.603+0.1202)) > 1e-6 {
		t.Errorf("valid range [%v, %v], want [0.2808, 1.7232]", curve.RatioMin, curve.RatioMax)
	}
	if code, _, stderr := runCmd("calibrate", "--pairs", pairs, "--model", "linear", "--out", out, "--range-margin", "0"); code != 0 {
		t.Fatalf("--range-margin 0: exit %d: %s", code, stderr)
	}
	if exact, err := calibration.Load(out); err != nil || exact.RatioMin != 0.401 || exact.RatioMax != 1.603 {
		t.Errorf("--range-margin 0: %v, range %v; want exactly [0.401, 1.603]", err, exact)
	}
	if curve.Name != "proto-b-pairs" || curve.DeviceModel != "proto-b" || curve.Version != 1 {
		t.Errorf("name %q device model %q version %d, want proto-b-pairs, proto-b, 1", curve.Name, curve.DeviceModel, curve.Version)
	}
	// The curve file and the stats carry the caution (docs/contracts.md,
	// "The caution on every output").
	if file, err := os.ReadFile(out); err != nil || !strings.HasPrefix(string(file), caution.Comment) {
		t.Errorf("curve file does not start with the caution line (%v):\n%s", err, file)
	}
	for _, want := range []string{"Arms %", "leave-one-subject-out", "bench-3", "mean predictor", "calibration file: " + out, caution.Line} {
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

// The camera-oximetry open data (Hoffman et al., npj Digit. Med. 5, 146
// (2022), MIT licence), one recording.
const cameraSubject2 = "../../testdata/camera-oximetry/subject-2"

func TestCalibratePairsFromRecording(t *testing.T) {
	out := filepath.Join(t.TempDir(), "pairs.csv")
	code, stdout, stderr := runCmd("calibrate", "pairs", "--raw", filepath.Join(cameraSubject2, "ppg_left.csv"),
		"--reference", filepath.Join(cameraSubject2, "reference.csv"), "--rate", "30", "--red-col", "r", "--ir-col", "g", "--out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	// The summary says how many windows were kept and dropped, and why.
	for _, want := range []string{"(subject subject-2)", "pairs kept", "dropped", "reference not stable", "pairs written to " + out} {
		if !strings.Contains(stdout, want) {
			t.Errorf("summary lacks %q:\n%s", want, stdout)
		}
	}
	f, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	// The pairs file starts with the caution line; calibrate reads it as is.
	afterCaution(t, "pairs CSV", string(f))
	pairs, err := calibration.ReadPairs(bytes.NewReader(f))
	if err != nil {
		t.Fatal(err)
	}
	// 1121 s of recording in 30 s windows: at most 37 pairs; the study
	// lowered SpO2 towards 70 %, so the pairs span more than 10 %.
	lo, hi := 100.0, 0.0
	for _, p := range pairs {
		if p.Subject != "subject-2" {
			t.Fatalf("pair subject %q, want subject-2", p.Subject)
		}
		lo, hi = math.Min(lo, p.ReferencePct), math.Max(hi, p.ReferencePct)
	}
	if len(pairs) < 10 || len(pairs) > 37 || hi-lo < 10 {
		t.Errorf("%d pairs spanning %.1f-%.1f %%, want 10..37 spanning > 10 %%", len(pairs), lo, hi)
	}
}

func TestCalibratePairsUsage(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"calibrate", "pairs", "--reference", "r.csv", "--rate", "30"}, "--raw: required"},
		{[]string{"calibrate", "pairs", "--raw", "a.csv", "--rate", "30"}, "--reference: required"},
		{[]string{"calibrate", "pairs", "--raw", "a.csv", "--reference", "r.csv"}, "--rate: required"},
		{[]string{"calibrate", "pairs", "--raw", "a.csv", "--raw", "b.csv", "--reference", "r.csv", "--subject", "x", "--rate", "30"}, "--subject: 1 names for 2 --raw"},
	} {
		code, _, stderr := runCmd(tc.args...)
		if code != 2 || !strings.Contains(stderr, tc.want) {
			t.Errorf("%v: exit %d, %q; want exit 2 and %q", tc.args, code, stderr, tc.want)
		}
	}
	if code, _, stderr := runCmd("calibrate", "pairs", "--help"); code != 0 || !strings.Contains(stderr, "--reference") {
		t.Errorf("pairs --help: exit %d, %q", code, stderr)
	}
}
