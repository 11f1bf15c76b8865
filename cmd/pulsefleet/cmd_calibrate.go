package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/calibration"
)

const calibrateSummary = `Fit a calibration curve (SpO2 from the ratio of ratios R) to pairs recorded
beside a reference oximeter, and score it: Arms, bias, SD, Bland-Altman limits of
agreement, Arms per decade, leave-one-subject-out when pairs name subjects.
Pairs CSV: header with ratio,reference_pct and optionally subject.
'calibrate pairs --help' builds pairs from raw recordings and a reference file.`

// calibrateOptions are the flags of 'calibrate'.
type calibrateOptions struct {
	pairs, model, out, name, deviceModel, report, format string
	version                                              int
}

func init() {
	register(command{name: "calibrate", summary: calibrateSummary, run: runCalibrate})
}

func runCalibrate(ctx context.Context, args []string, s stdio) error {
	if len(args) > 0 && args[0] == "pairs" {
		return runCalibratePairs(ctx, args[1:], s)
	}
	fs := newFlagSet("calibrate", "--pairs FILE --model linear|quadratic [--out FILE] [--report DIR] [--format text|json]", s.err)
	var o calibrateOptions
	fs.StringVar(&o.pairs, "pairs", "", "pairs CSV (ratio,reference_pct[,subject]); - for standard input (required)")
	fs.StringVar(&o.model, "model", "", "curve model: linear or quadratic (required)")
	fs.StringVar(&o.out, "out", "", "write the calibration file (YAML) here; without it nothing is saved")
	fs.StringVar(&o.name, "name", "", "curve name, [a-z0-9._-] (default: from the pairs file name)")
	fs.IntVar(&o.version, "version", 1, "curve version (>= 1)")
	fs.StringVar(&o.deviceModel, "device-model", "", "device model the pairs were recorded with (optional)")
	fs.StringVar(&o.report, "report", "", "write curve.svg, bland_altman.svg (and bland_altman_loso.svg) and report.html to this directory")
	fs.StringVar(&o.format, "format", "text", "stats on standard output: text or json")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	switch {
	case o.pairs == "":
		return usagef("--pairs: required")
	case o.model != calibration.Linear && o.model != calibration.Quadratic:
		return usagef("--model: %q, want linear or quadratic", o.model)
	case o.format != "text" && o.format != "json":
		return usagef("--format: %q, want text or json", o.format)
	case o.version < 1:
		return usagef("--version: %d, want >= 1", o.version)
	}
	if o.name == "" {
		o.name = nameFromPath(o.pairs)
	}
	pairs, err := readPairsFile(o.pairs, s.in)
	if err != nil {
		return err
	}
	res, err := calibration.Calibrate(pairs, calibration.FitOptions{
		Model: o.model, Name: o.name, Version: o.version, DeviceModel: o.deviceModel,
		FittedAt: time.Now().UTC().Format(time.RFC3339),
	})
	if err != nil {
		return fmt.Errorf("%s: %w", o.pairs, err)
	}
	if o.out != "" {
		data, err := res.Curve.Marshal()
		if err != nil {
			return err
		}
		if err := os.WriteFile(o.out, data, 0o644); err != nil {
			return fmt.Errorf("write calibration: %w", err)
		}
	}
	if o.report != "" {
		if err := writeCalibrationReport(o.report, res); err != nil {
			return err
		}
	}
	if o.format == "json" {
		return res.WriteJSON(s.out)
	}
	if err := res.WriteText(s.out); err != nil {
		return err
	}
	if o.out != "" {
		fmt.Fprintf(s.out, "\ncalibration file: %s\n", o.out)
	} else {
		fmt.Fprintln(s.out, "\n(no --out: the calibration file was not written)")
	}
	if o.report != "" {
		fmt.Fprintf(s.out, "report: %s\n", filepath.Join(o.report, "report.html"))
	}
	return nil
}

func readPairsFile(path string, stdin io.Reader) ([]calibration.Pair, error) {
	if path == "-" {
		p, err := calibration.ReadPairs(stdin)
		if err != nil {
			return nil, fmt.Errorf("standard input: %w", err)
		}
		return p, nil
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	p, err := calibration.ReadPairs(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return p, nil
}

var notNameChar = regexp.MustCompile(`[^a-z0-9._-]+`)

// nameFromPath derives a valid curve name from a file name.
func nameFromPath(path string) string {
	base := strings.TrimSuffix(filepath.Base(path), filepath.Ext(path))
	n := strings.Trim(notNameChar.ReplaceAllString(strings.ToLower(base), "-"), "-.")
	if n == "" {
		n = "calibration"
	}
	if len(n) > 64 {
		n = n[:64]
	}
	return n
}

// writeCalibrationReport writes the plots and the HTML summary into dir.
func writeCalibrationReport(dir string, res *calibration.Result) error {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	files := map[string]func(io.Writer) error{
		"curve.svg":        res.WriteCurveSVG,
		"bland_altman.svg": func(w io.Writer) error { return res.WriteBlandAltmanSVG(w, false) },
		"report.html":      res.WriteHTML,
	}
	if res.LOSO != nil {
		files["bland_altman_loso.svg"] = func(w io.Writer) error { return res.WriteBlandAltmanSVG(w, true) }
	}
	for name, write := range files {
		if err := writeFileWith(filepath.Join(dir, name), write); err != nil {
			return fmt.Errorf("report: %w", err)
		}
	}
	return nil
}

func writeFileWith(path string, write func(io.Writer) error) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if err := write(f); err != nil {
		f.Close()
		return fmt.Errorf("%s: %w", path, err)
	}
	return f.Close()
}

func runCalibratePairs(ctx context.Context, args []string, s stdio) error {
	return fmt.Errorf("calibrate pairs: not available yet (waits for the estimator package)")
}
