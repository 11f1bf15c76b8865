package main

import (
	"bytes"
	"context"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// ppgCSV writes seconds of model PPG as CSV (t_s,red,ir,note at rateHz)
// and returns its path.
func ppgCSV(t *testing.T, rateHz float64, seconds int, rel ppgmodel.Relation, spo2 float64, withT bool) string {
	t.Helper()
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rateHz, ADCBits: 16, Relation: rel, Seed: 11})
	n := int(rateHz * float64(seconds))
	red, ir := make([]float64, n), make([]float64, n)
	v := ppgmodel.DefaultVitals()
	v.SpO2Pct = spo2
	src.Fill(red, ir, nil, v)
	var b strings.Builder
	if withT {
		b.WriteString("t_s,")
	}
	b.WriteString("red,ir,note\n")
	for i := range red {
		if withT {
			fmt.Fprintf(&b, "%.4f,", float64(i)/rateHz)
		}
		fmt.Fprintf(&b, "%.0f,%.0f,x\n", red[i], ir[i])
	}
	p := filepath.Join(t.TempDir(), "ppg.csv")
	if err := os.WriteFile(p, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

// pf runs the binary's entry point and returns exit status, stdout, stderr.
func pf(t *testing.T, stdin string, args ...string) (int, string, string) {
	t.Helper()
	var out, errb bytes.Buffer
	code := run(context.Background(), args, stdio{in: strings.NewReader(stdin), out: &out, err: &errb})
	return code, out.String(), errb.String()
}

// parseOutput checks the contract header and returns the rows.
func parseOutput(t *testing.T, out string, extra ...string) [][]string {
	t.Helper()
	lines := strings.Split(strings.TrimSuffix(afterCaution(t, "estimate output", out), "\n"), "\n")
	want := strings.Join(append([]string{"t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio"}, extra...), ",")
	if lines[0] != want {
		t.Fatalf("header %q, want %q", lines[0], want)
	}
	var rows [][]string
	for _, l := range lines[1:] {
		rows = append(rows, strings.Split(l, ","))
	}
	return rows
}

func cell(t *testing.T, row []string, i int) float64 {
	t.Helper()
	if row[i] == "" {
		return math.NaN()
	}
	v, err := strconv.ParseFloat(row[i], 64)
	if err != nil {
		t.Fatalf("row %v cell %d: %v", row, i, err)
	}
	return v
}

func TestEstimateCSVContract(t *testing.T) {
	in := ppgCSV(t, 100, 30, ppgmodel.RelationEmpirical, 95, true)
	outPath := filepath.Join(t.TempDir(), "est.csv")
	code, _, stderr := pf(t, "", "estimate", "--rate", "100", "--in", in, "--out", outPath)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	data, err := os.ReadFile(outPath)
	if err != nil {
		t.Fatal(err)
	}
	rows := parseOutput(t, string(data))
	if len(rows) != 30 {
		t.Fatalf("%d rows for 30 s of input, want 30", len(rows))
	}
	for k, r := range rows {
		if len(r) != 6 || r[0] != strconv.Itoa(k) {
			t.Errorf("row %d = %v, want 6 cells starting with t_s %d", k, r, k)
		}
	}
	// The first second cannot have a value: empty cells, never a made-up number.
	if rows[0][1] != "" || rows[0][2] != "" || rows[0][5] != "" {
		t.Errorf("first second %v, want empty spo2, pulse and ratio", rows[0])
	}
	last := rows[len(rows)-1]
	if v := cell(t, last, 1); math.Abs(v-95) > 1 {
		t.Errorf("SpO2 %v at the end, want 95 +- 1 (model driven by the empirical line)", v)
	}
	if v := cell(t, last, 2); math.Abs(v-72) > 2 {
		t.Errorf("pulse %v, want 72 +- 2", v)
	}
	if v := cell(t, last, 4); v < 0 || v > 1 {
		t.Errorf("sqi %v, want 0..1", v)
	}
}

func TestEstimateInfersRateFromTimeColumnAndUsesStdio(t *testing.T) {
	in, _ := os.ReadFile(ppgCSV(t, 250, 12, ppgmodel.RelationEmpirical, 97, true))
	code, out, stderr := pf(t, string(in), "estimate", "--flags")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	rows := parseOutput(t, out, "flags")
	if len(rows) != 12 {
		t.Fatalf("%d rows, want 12", len(rows))
	}
	if rows[0][6] != "no_pulse" {
		t.Errorf("first second flags %q, want no_pulse", rows[0][6])
	}
	if v := cell(t, rows[11], 1); math.Abs(v-97) > 1 {
		t.Errorf("SpO2 %v, want 97 +- 1", v)
	}
}

func TestEstimateBeerLambertAndCurveFile(t *testing.T) {
	in := ppgCSV(t, 100, 20, ppgmodel.RelationBeerLambert, 88, false)
	code, out, stderr := pf(t, "", "estimate", "--rate", "100", "--in", in, "--calibration", "beer-lambert", "--red-nm", "660", "--ir-nm", "940")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	rows := parseOutput(t, out)
	if v := cell(t, rows[len(rows)-1], 1); math.Abs(v-88) > 1 {
		t.Errorf("beer-lambert: SpO2 %v, want 88 +- 1", v)
	}
	// A fitted curve that is the empirical line reads like --calibration empirical.
	curve := filepath.Join(t.TempDir(), "line.yaml")
	os.WriteFile(curve, []byte("name: line\nversion: 1\nmodel: linear\ncoefficients: [110, -25]\nratio_min: 0.2\nratio_max: 2.4\n"), 0o644)
	in = ppgCSV(t, 100, 20, ppgmodel.RelationEmpirical, 90, false)
	_, a, _ := pf(t, "", "estimate", "--rate", "100", "--in", in)
	code, b, stderr := pf(t, "", "estimate", "--rate", "100", "--in", in, "--calibration", curve)
	if code != 0 {
		t.Fatalf("curve file: exit %d: %s", code, stderr)
	}
	if a != b {
		t.Errorf("curve file equal to the empirical line gives different output:\n%s\nvs\n%s", b, a)
	}
}

func TestEstimateBadUsage(t *testing.T) {
	noT := ppgCSV(t, 100, 3, ppgmodel.RelationEmpirical, 97, false)
	slow := filepath.Join(t.TempDir(), "slow.csv")
	os.WriteFile(slow, []byte("t_s,red,ir\n0,1,1\n0.1,1,1\n0.2,1,1\n"), 0o644)
	for _, c := range []struct {
		name string
		args []string
		code int
		want string
	}{
		{"rate required", []string{"--in", noT}, 2, "--rate: required"},
		{"rate bound", []string{"--rate", "10", "--in", noT}, 2, "--rate: 10 Hz, want 25..1000 Hz"},
		{"inferred rate bound", []string{"--in", slow}, 1, "25..1000 Hz"},
		{"window bound", []string{"--rate", "100", "--window", "1s", "--in", noT}, 2, "--window: 1 s, want 2..30 s"},
		{"adc bits", []string{"--rate", "100", "--adc-bits", "3", "--in", noT}, 2, "--adc-bits: 3"},
		{"missing column", []string{"--rate", "100", "--ir-col", "nir", "--in", noT}, 1, `no column "nir" (--ir-col)`},
		{"unknown calibration", []string{"--rate", "100", "--calibration", "no-such-file.yaml", "--in", noT}, 2, "no-such-file.yaml"},
		{"beer-lambert out of table", []string{"--rate", "100", "--calibration", "beer-lambert", "--red-nm", "530", "--in", noT}, 2, "outside the extinction table"},
		{"missing input", []string{"--rate", "100", "--in", "/nonexistent/x.csv"}, 1, "--in"},
	} {
		code, _, stderr := pf(t, "", append([]string{"estimate"}, c.args...)...)
		if code != c.code || !strings.Contains(stderr, c.want) {
			t.Errorf("%s: exit %d, stderr %q; want exit %d and %q", c.name, code, stderr, c.code, c.want)
		}
	}
}

func TestEstimateBadCSVNamesLineAndColumn(t *testing.T) {
	for _, c := range []struct{ in, want string }{
		{"red,ir\n1,2\n3,4\n5,oops\n", `line 4, column "ir" (field 2): "oops" is not a finite number`},
		{"red,ir\n1,2\n,4\n", `line 3, column "red" (field 1): empty`},
		{"red,ir\n1,2\n3,4,5\n", "line 3"},
		{"red,ir\n1,2\n\"3,4\n", "line 3"},
		{"red,ir\n1,NaN\n", `line 2, column "ir"`},
	} {
		code, _, stderr := pf(t, c.in, "estimate", "--rate", "100")
		if code != 1 || !strings.Contains(stderr, c.want) {
			t.Errorf("input %q: exit %d, stderr %q; want exit 1 and %q", c.in, code, stderr, c.want)
		}
	}
}

// A failed run does not leave a half-written --out file.
func TestEstimateFailureLeavesNoOutput(t *testing.T) {
	dir := t.TempDir()
	in := filepath.Join(dir, "in.csv")
	os.WriteFile(in, []byte("red,ir\n1,2\nx,4\n"), 0o644)
	out := filepath.Join(dir, "out.csv")
	if code, _, _ := pf(t, "", "estimate", "--rate", "100", "--in", in, "--out", out); code != 1 {
		t.Fatalf("exit %d, want 1", code)
	}
	entries, _ := os.ReadDir(dir)
	if len(entries) != 1 {
		t.Errorf("directory holds %v after a failed run, want only the input", entries)
	}
}

func TestEstimateHeaderOnly(t *testing.T) {
	code, out, stderr := pf(t, "t_s,red,ir\n", "estimate")
	if code != 0 || out != caution.Comment+"t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio\n" {
		t.Errorf("header-only input: exit %d, out %q, err %q; want the caution and the header alone", code, out, stderr)
	}
}

// The camera recordings' channels are named r, g, b and are float frame
// means (0-255): --red-col/--ir-col pick them, --adc-bits 0 skips the
// resolution checks, and the rate (30 Hz) comes from t_s.
func TestEstimateCameraColumns(t *testing.T) {
	in := filepath.Join("..", "..", "testdata", "camera-oximetry", "subject-1", "ppg_left.csv")
	code, out, stderr := pf(t, "", "estimate", "--in", in, "--red-col", "r", "--ir-col", "g", "--adc-bits", "0", "--flags")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	rows := parseOutput(t, out, "flags")
	pulse := 0
	for _, r := range rows {
		if strings.Contains(r[6], "low_resolution") || strings.Contains(r[6], "clipping") {
			t.Fatalf("row %v: resolution/clipping checks ran with --adc-bits 0", r)
		}
		if r[2] != "" {
			pulse++
		}
	}
	// 32,727 frames at 30 Hz: 1,090 whole seconds.
	if len(rows) != 1090 || pulse < 1000 {
		t.Errorf("%d rows with pulse on %d, want 1090 rows, pulse on most", len(rows), pulse)
	}
}

func TestResolveCalibration(t *testing.T) {
	for _, name := range []string{"", "empirical"} {
		c, err := resolveCalibration(name, 660, 940)
		if err != nil {
			t.Fatal(err)
		}
		if v, _ := c.SpO2(0.5); v != 97.5 { // docs/references.md, empirical line: R 0.5 -> 97.5
			t.Errorf("%q: SpO2(0.5) = %v, want 97.5", name, v)
		}
	}
	c, err := resolveCalibration("beer-lambert", 660, 940)
	if err != nil {
		t.Fatal(err)
	}
	if v, _ := c.SpO2(1.0); math.Abs(v-73.91) > 0.005 { // docs/references.md: S(R=1.0) = 73.91 % at 660/940 nm
		t.Errorf("beer-lambert: SpO2(1.0) = %v, want 73.91", v)
	}
	if _, err := resolveCalibration("beer-lambert", 660, 1000); err == nil || !strings.Contains(err.Error(), "--ir-nm 1000") {
		t.Errorf("beer-lambert at 1000 nm: %v, want an error naming --ir-nm", err)
	}
	curve := filepath.Join(t.TempDir(), "c.yaml")
	os.WriteFile(curve, []byte("name: q\nversion: 2\nmodel: quadratic\ncoefficients: [100, 0, -10]\nratio_min: 0.3\nratio_max: 1.5\n"), 0o644)
	c, err = resolveCalibration(curve, 660, 940)
	if err != nil {
		t.Fatal(err)
	}
	if v, ok := c.SpO2(1.0); !ok || v != 90 {
		t.Errorf("curve: SpO2(1.0) = %v, %v; want 90", v, ok)
	}
	if _, ok := c.SpO2(2.0); ok {
		t.Error("curve: a value outside ratio_max")
	}
	var _ estimator.Calibration = c
	if _, err := resolveCalibration("Empirical", 660, 940); err == nil {
		t.Error("a misspelt name was accepted")
	}
}

func TestEstimateHelp(t *testing.T) {
	code, _, stderr := pf(t, "", "estimate", "--help")
	if code != 0 || !strings.Contains(stderr, "--calibration") || !strings.Contains(stderr, "t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio") {
		t.Errorf("--help: exit %d, %q", code, stderr)
	}
}

// FuzzEstimateCSV: any input either fails with an error naming where, or
// gives the contract header and rows of six cells.
func FuzzEstimateCSV(f *testing.F) {
	f.Add("t_s,red,ir\n0,1,2\n0.01,3,4\n")
	f.Add("red,ir\n1,2\n3,oops\n")
	f.Add("red,ir\n\"1,2\n")
	f.Add("red,ir,ambient\n1e308,-1e308,0\nNaN,Inf,1\n")
	f.Add("red,ir\n" + strings.Repeat("1000,900\n1010,905\n", 40))
	f.Add("\ufefft_s,red,ir\n0,1,1\n0,1,1\n")
	f.Fuzz(func(t *testing.T, in string) {
		var out, errb bytes.Buffer
		code := run(context.Background(), []string{"estimate", "--rate", "25"}, stdio{in: strings.NewReader(in), out: &out, err: &errb})
		if code != 0 {
			if !strings.Contains(errb.String(), "line") && !strings.Contains(errb.String(), "empty input") {
				t.Errorf("exit %d, message %q names no line", code, errb.String())
			}
			return
		}
		lines := strings.Split(strings.TrimSuffix(afterCaution(t, "estimate output", out.String()), "\n"), "\n")
		if lines[0] != "t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio" {
			t.Fatalf("header %q", lines[0])
		}
		for _, l := range lines[1:] {
			if strings.Count(l, ",") != 5 {
				t.Fatalf("row %q has not 6 cells", l)
			}
		}
	})
}
