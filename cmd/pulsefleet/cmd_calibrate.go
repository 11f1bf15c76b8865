package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/calibration/pairing"
)

const calibrateSummary = `Fit and score a calibration curve (SpO2 from R); 'calibrate pairs' builds pairs from recordings.

Fits a linear or quadratic curve to pairs recorded beside a reference oximeter and scores it: Arms, bias, SD, Bland-Altman limits of
agreement, Arms per decade, leave-one-subject-out when pairs name subjects.
Pairs CSV: header with ratio,reference_pct and optionally subject.
'calibrate pairs --help' builds pairs from raw recordings and a reference file; 'calibrate study --help' compares
channel pairs, ratio methods and reference lags by leave-one-subject-out without tuning on the held-out subject.`

// calibrateOptions are the flags of 'calibrate'.
type calibrateOptions struct {
	pairs, model, out, name, deviceModel, report, format string
	version                                              int
	rangeMargin                                          float64
}

func init() {
	register(command{name: "calibrate", summary: calibrateSummary, run: runCalibrate})
}

func runCalibrate(ctx context.Context, args []string, s stdio) error {
	if len(args) > 0 && args[0] == "pairs" {
		return runCalibratePairs(ctx, args[1:], s)
	}
	if len(args) > 0 && args[0] == "study" {
		return runCalibrateStudy(ctx, args[1:], s)
	}
	fs := newFlagSet("calibrate", "--pairs FILE --model linear|quadratic [--out FILE] [--report DIR] [--format text|json]", s.err)
	var o calibrateOptions
	o.register(fs)
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
	case !(o.rangeMargin >= 0 && o.rangeMargin <= 1):
		return usagef("--range-margin: %v, want 0..1", o.rangeMargin)
	}
	margin := o.rangeMargin
	if margin == 0 {
		margin = -1 // the package's "none"
	}
	if o.name == "" {
		o.name = nameFromPath(o.pairs)
	}
	pairs, anchor, err := readPairsFile(o.pairs, s.in)
	if err != nil {
		return err
	}
	res, err := calibration.Calibrate(pairs, calibration.FitOptions{
		Model: o.model, Name: o.name, Version: o.version, DeviceModel: o.deviceModel,
		FittedAt: time.Now().UTC().Format(time.RFC3339), RangeMargin: margin,
	})
	if err != nil {
		return fmt.Errorf("%s: %w", o.pairs, err)
	}
	res.Curve.WithAnchor(anchor) // pairs of R/R0 give a curve on R/R0, and it says so
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
	return o.printText(s.out, res)
}

func (o *calibrateOptions) register(fs *flag.FlagSet) {
	fs.StringVar(&o.pairs, "pairs", "", "pairs CSV (ratio,reference_pct[,subject]); - for standard input (required)")
	fs.StringVar(&o.model, "model", "", "curve model: linear or quadratic (required)")
	fs.StringVar(&o.out, "out", "", "write the calibration file (YAML) here; without it nothing is saved")
	fs.StringVar(&o.name, "name", "", "curve name, [a-z0-9._-] (default: from the pairs file name)")
	fs.IntVar(&o.version, "version", 1, "curve version (>= 1)")
	fs.StringVar(&o.deviceModel, "device-model", "", "device model the pairs were recorded with (optional)")
	fs.StringVar(&o.report, "report", "", "write curve.svg, bland_altman.svg (and bland_altman_loso.svg) and report.html to this directory")
	fs.StringVar(&o.format, "format", "text", "stats on standard output: text or json")
	fs.Float64Var(&o.rangeMargin, "range-margin", 0.1, "widen the curve's valid R range by this fraction of the fitted span on each side (0 = exactly the fitted range)")
}

// printText writes the fit's statistics as text and says where the files went.
func (o *calibrateOptions) printText(w io.Writer, res *calibration.Result) error {
	if err := res.WriteText(w); err != nil {
		return err
	}
	if c := res.Curve; c.Anchored() {
		fmt.Fprintf(w, "\ninput: anchored ratio R/R0 (R above is R/R0): R0 is each device's room-air anchor, the median of its usable ratios (SQI >= %g)\n"+
			"  over %d s from its first usable second, at least %d usable seconds; the person must be at rest on room air then.\n"+
			"  The gateway shows SpO2 as not available until the anchor is complete; estimate and tune refuse this curve.\n", c.AnchorMinSQI, c.AnchorS, c.AnchorMinSec)
	}
	if o.out != "" {
		fmt.Fprintf(w, "\ncalibration file: %s\n", o.out)
	} else {
		fmt.Fprintln(w, "\n(no --out: the calibration file was not written)")
	}
	if o.report != "" {
		fmt.Fprintf(w, "report: %s\n", filepath.Join(o.report, "report.html"))
	}
	return nil
}

// readPairsFile reads pairs of R or of the anchored ratio R/R0 (then the
// anchor they are divided by, which the fitted curve records).
func readPairsFile(path string, stdin io.Reader) ([]calibration.Pair, estimator.AnchorSpec, error) {
	if path == "-" {
		p, spec, err := calibration.ReadPairsAnchored(stdin)
		if err != nil {
			return nil, spec, fmt.Errorf("standard input: %w", err)
		}
		return p, spec, nil
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, estimator.AnchorSpec{}, err
	}
	defer f.Close()
	p, spec, err := calibration.ReadPairsAnchored(f)
	if err != nil {
		return nil, spec, fmt.Errorf("%s: %w", path, err)
	}
	return p, spec, nil
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

// stringList is a repeatable string flag.
type stringList []string

func (l *stringList) String() string     { return strings.Join(*l, ",") }
func (l *stringList) Set(v string) error { *l = append(*l, v); return nil }

const calibratePairsSynopsis = "pairs --raw FILE --reference FILE --rate HZ [--red-col NAME --ir-col NAME] [--subject NAME] [--anchor S] [--out pairs.csv]"

// runCalibratePairs builds calibration pairs from raw recordings and
// reference files.
func runCalibratePairs(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("calibrate", calibratePairsSynopsis, s.err)
	var raws, refs, subs stringList
	var o pairing.Options
	var out string
	fs.Var(&raws, "raw", "raw PPG CSV (estimate input: header, two channel columns); repeat for several recordings")
	fs.Var(&refs, "reference", "reference CSV: t_s,spo2_ref_pct (or reference_pct)[,subject|device]; one per --raw, or one for all")
	fs.Var(&subs, "subject", "subject of each --raw (repeat in the same order); also selects the reference rows when the file has a subject/device column (default: the raw file's folder name)")
	fs.Float64Var(&o.RateHz, "rate", 0, "raw sample rate, Hz (required)")
	fs.StringVar(&o.RedCol, "red-col", "red", "first channel column (red, or the longer camera wavelength)")
	fs.StringVar(&o.IRCol, "ir-col", "ir", "second channel column (infrared, or a camera's g or b)")
	fs.IntVar(&o.ADCBits, "adc-bits", estimator.ADCBitsAuto, adcBitsUsage)
	fs.Float64Var(&o.AveragingS, "averaging", 0, "estimator averaging window, s (0 = the estimator's default)")
	fs.IntVar(&o.Align.WindowS, "window", 30, "pairing window, s: one pair per stable window")
	fs.Float64Var(&o.Align.MaxReferenceSpreadPct, "max-spread", 2, "stable: reference max-min within a window at most this, % SpO2")
	fs.Float64Var(&o.Align.MinSQI, "min-sqi", 0.5, "a device second counts when its SQI is at least this (0..1)")
	fs.Float64Var(&o.Align.MinValidFraction, "min-valid", 0.5, "share of a window's seconds that need a ratio with good SQI")
	fs.IntVar(&o.Align.ReferenceLagS, "lag", 0, "compare device second k with reference second k+lag")
	var ratio string
	fs.StringVar(&ratio, "ratio", string(estimator.RatioBeatSlope), "ratio method: slope (regression slope over each beat), derivative (of the differenced channels) or spectral (at the pulse frequency)")
	fs.BoolVar(&o.Align.QualityWeights, "quality-weights", false, "SQI-weighted window ratio and a weight column for a weighted fit")
	fs.StringVar(&out, "out", "", "write the pairs CSV here (default: standard output)")
	fs.IntVar(&o.AnchorS, "anchor", 0, "divide each recording's ratios by its room-air anchor R0, the median of its usable ratios (SQI >= --min-sqi) over this many seconds from its first usable second; the pairs (column anchored_ratio) then fit a curve on R/R0 (0 = raw R)")
	fs.IntVar(&o.AnchorMinSeconds, "anchor-min-seconds", pairing.MinAnchorSeconds, "usable seconds a recording's anchor needs (with --anchor)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if o.AnchorS != 0 {
		if err := o.AnchorSpec().Validate(); err != nil {
			return usagef("--anchor %d: %v", o.AnchorS, err)
		}
	}
	if err := checkRecordingArgs(raws, refs, subs, o.RateHz); err != nil {
		return err
	}
	if err := checkADCBits(o.ADCBits); err != nil {
		return err
	}
	r, err := parseRatio(ratio)
	if err != nil {
		return err
	}
	o.Ratio = r
	var all []calibration.Pair
	var total calibration.AlignReport
	summary := s.err
	if out != "" {
		summary = s.out
	}
	for i, raw := range raws {
		ref := refs[0]
		if len(refs) > 1 {
			ref = refs[i]
		}
		o.Align.Subject, o.ReferenceSubject = filepath.Base(filepath.Dir(raw)), ""
		if len(subs) > 0 {
			o.Align.Subject, o.ReferenceSubject = subs[i], subs[i]
		}
		pairs, rep, err := pairRecording(raw, ref, o)
		if err != nil {
			return err
		}
		fmt.Fprintf(summary, "%s (subject %s): %s\n", raw, o.Align.Subject, rep)
		all = append(all, pairs...)
		total.Add(rep)
	}
	if len(raws) > 1 {
		fmt.Fprintf(summary, "total: %s\n", total)
	}
	spec := o.AnchorSpec()
	if out == "" {
		return calibration.WritePairsAnchored(s.out, all, spec)
	}
	if err := writeFileWith(out, func(w io.Writer) error { return calibration.WritePairsAnchored(w, all, spec) }); err != nil {
		return fmt.Errorf("write pairs: %w", err)
	}
	fmt.Fprintf(summary, "%d pairs written to %s\n", len(all), out)
	return nil
}

func pairRecording(rawPath, refPath string, o pairing.Options) ([]calibration.Pair, calibration.AlignReport, error) {
	raw, err := os.Open(rawPath)
	if err != nil {
		return nil, calibration.AlignReport{}, err
	}
	defer raw.Close()
	ref, err := os.Open(refPath)
	if err != nil {
		return nil, calibration.AlignReport{}, err
	}
	defer ref.Close()
	pairs, rep, err := pairing.FromRecording(raw, ref, o)
	if err != nil {
		return nil, rep, fmt.Errorf("%s with %s: %w", rawPath, refPath, err)
	}
	return pairs, rep, nil
}

// checkRecordingArgs checks the recording flags that calibrate pairs and
// calibrate study share: --raw, --reference, --subject and --rate.
func checkRecordingArgs(raws, refs, subs []string, rateHz float64) error {
	switch {
	case len(raws) == 0:
		return usagef("--raw: required")
	case len(refs) == 0:
		return usagef("--reference: required")
	case len(refs) != 1 && len(refs) != len(raws):
		return usagef("--reference: %d files for %d --raw, want 1 or %d", len(refs), len(raws), len(raws))
	case len(subs) != 0 && len(subs) != len(raws):
		return usagef("--subject: %d names for %d --raw, want %d", len(subs), len(raws), len(raws))
	case rateHz <= 0:
		return usagef("--rate: required, in Hz")
	}
	return nil
}
