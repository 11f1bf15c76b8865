package main

import (
	"bufio"
	"context"
	"encoding/csv"
	"errors"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/progress"
)

const estimateSummary = `Estimate SpO2, pulse rate, perfusion index and signal quality, one row per
second, from a CSV recording of raw two-channel PPG (one row per sample).
Input: a header row with columns red and ir (or those named by --red-col and
--ir-col), optionally t_s and an ambient column; other columns are ignored.
Output: t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio (plus flags with --flags); an
empty cell where no valid value exists. A partial last second is not written.
pi_pct is the second (ir) channel's AC/DC x 100; ratio is the ratio of ratios.`

// estimateOptions are the flags of 'estimate'.
type estimateOptions struct {
	rate                      float64
	redCol, irCol, ambientCol string
	calibration               string
	redNM, irNM               float64
	adcBits                   int
	window                    string
	ratio                     string
	in, out                   string
	flags                     bool
}

func init() {
	register(command{name: "estimate", summary: estimateSummary, run: runEstimateCmd})
}

func runEstimateCmd(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("estimate", "[--rate HZ] [--red-col NAME --ir-col NAME] [--calibration NAME|FILE] [--in FILE] [--out FILE]", s.err)
	var o estimateOptions
	fs.Float64Var(&o.rate, "rate", 0, fmt.Sprintf("sample rate, Hz (%v..%v); required unless the input has a t_s column to infer it from", estimator.MinSampleRateHz, estimator.MaxSampleRateHz))
	fs.StringVar(&o.redCol, "red-col", "red", "column of the first channel (red, or the longer wavelength of another pair)")
	fs.StringVar(&o.irCol, "ir-col", "ir", "column of the second channel (infrared); beats are found on it and pi_pct is its AC/DC")
	fs.StringVar(&o.ambientCol, "ambient-col", "", "column of ambient light to subtract from both channels (optional)")
	fs.StringVar(&o.calibration, "calibration", calibrationEmpirical, "empirical (110 - 25 R), beer-lambert (model at --red-nm/--ir-nm), or a curve file from 'calibrate'")
	fs.Float64Var(&o.redNM, "red-nm", 660, "first channel's wavelength, nm (used by beer-lambert; table covers 650..950)")
	fs.Float64Var(&o.irNM, "ir-nm", 940, "second channel's wavelength, nm (used by beer-lambert)")
	fs.IntVar(&o.adcBits, "adc-bits", estimator.ADCBitsAuto, adcBitsUsage)
	fs.StringVar(&o.window, "window", "", fmt.Sprintf("averaging window, seconds or a duration such as 8s (%v..%v s; default %v s)", estimator.MinAveragingS, estimator.MaxAveragingS, estimator.DefaultAveragingS))
	fs.StringVar(&o.ratio, "ratio", string(estimator.RatioBeatSlope), "ratio method: slope (regression slope of the channels over each beat), derivative (of their first differences) or spectral (at the pulse frequency)")
	fs.StringVar(&o.in, "in", "-", "input CSV; - for standard input")
	fs.StringVar(&o.out, "out", "-", "output CSV; - for standard output")
	fs.BoolVar(&o.flags, "flags", false, "append a flags column saying why values were withheld (no_pulse|sensor_off|clipping|motion|low_resolution)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	return runEstimate(ctx, o, s)
}

// runEstimate validates the options, then streams input to output.
func runEstimate(ctx context.Context, o estimateOptions, s stdio) error {
	window, err := parseWindow(o.window)
	if err != nil {
		return err
	}
	if o.rate != 0 {
		if err := checkRate(o.rate, "--rate"); err != nil {
			return err
		}
	}
	if err := checkADCBits(o.adcBits); err != nil {
		return err
	}
	if o.redCol == "" || o.irCol == "" || o.redCol == o.irCol {
		return usagef("--red-col %q and --ir-col %q: want two different column names", o.redCol, o.irCol)
	}
	cal, err := resolveCalibration(o.calibration, o.redNM, o.irNM)
	if err != nil {
		return usageError{err.Error()}
	}
	if _, err := parseRatio(o.ratio); err != nil {
		return err
	}

	in := s.in
	var size int64
	if o.in != "-" {
		f, err := os.Open(o.in)
		if err != nil {
			return fmt.Errorf("--in: %w", err)
		}
		defer f.Close()
		in = f
		if fi, err := f.Stat(); err == nil {
			size = fi.Size()
		}
	}
	name := o.in
	if name == "-" {
		name = "standard input"
	}

	out, commit, err := openOutput(o.out, s.out)
	if err != nil {
		return err
	}
	defer commit(false)
	w := bufio.NewWriterSize(out, 64<<10)
	e := &estimateRun{opts: o, cal: cal, window: window, name: name, w: w, progress: progressWriter(s.err, size), warn: s.err}
	if err := e.run(ctx, in); err != nil {
		return err
	}
	e.warnWithheld()
	if err := w.Flush(); err != nil {
		return fmt.Errorf("write output: %w", err)
	}
	return commit(true)
}

func checkRate(r float64, what string) error {
	if math.IsNaN(r) || r < estimator.MinSampleRateHz || r > estimator.MaxSampleRateHz {
		return usagef("%s: %v Hz, want %v..%v Hz", what, r, estimator.MinSampleRateHz, estimator.MaxSampleRateHz)
	}
	return nil
}

// parseWindow accepts seconds ("8", "7.5") or a duration ("8s", "1m"); ""
// is the default.
func parseWindow(v string) (float64, error) {
	if v == "" {
		return 0, nil
	}
	sec, err := strconv.ParseFloat(v, 64)
	if err != nil {
		d, derr := time.ParseDuration(v)
		if derr != nil {
			return 0, usagef("--window: %q, want seconds or a duration such as 8s", v)
		}
		sec = d.Seconds()
	}
	if math.IsNaN(sec) || sec < estimator.MinAveragingS || sec > estimator.MaxAveragingS {
		return 0, usagef("--window: %v s, want %v..%v s", sec, estimator.MinAveragingS, estimator.MaxAveragingS)
	}
	return sec, nil
}

// openOutput returns the writer for --out and a commit function: with a
// file, output goes to a temporary file beside it that commit(true) renames
// into place, so a failed run leaves no half-written file; commit(false)
// discards it.
func openOutput(path string, stdout io.Writer) (io.Writer, func(ok bool) error, error) {
	if path == "-" {
		return stdout, func(bool) error { return nil }, nil
	}
	f, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".*.tmp")
	if err != nil {
		return nil, nil, fmt.Errorf("--out: %w", err)
	}
	done := false
	return f, func(ok bool) error {
		if done {
			return nil
		}
		done = true
		if !ok {
			f.Close()
			os.Remove(f.Name())
			return nil
		}
		if err := f.Close(); err != nil {
			os.Remove(f.Name())
			return fmt.Errorf("--out: %w", err)
		}
		if err := os.Rename(f.Name(), path); err != nil {
			os.Remove(f.Name())
			return fmt.Errorf("--out: %w", err)
		}
		return nil
	}, nil
}

// estimateRun is one pass over an input.
type estimateRun struct {
	opts     estimateOptions
	cal      estimator.Calibration
	window   float64
	name     string // input, for messages
	w        *bufio.Writer
	progress func(seconds int64, done bool)
	warn     io.Writer // notes and warnings (standard error)

	seconds, withheld int64                          // seconds written, and those without SpO2
	flagSeconds       [len(estimatorFlagNames)]int64 // withheld seconds per flag

	st           *estimator.Stream
	t0           float64
	red, ir, amb []float64
	est          []estimator.Estimate
	line         []byte
}

// inferRows is how many rows are read to infer the rate from t_s.
const inferRows = 256

func (e *estimateRun) run(ctx context.Context, in io.Reader) error {
	r := csv.NewReader(bufio.NewReaderSize(in, 256<<10))
	r.ReuseRecord = true
	r.Comment = '#' // the caution line atop pulsefleet's own CSV files
	c, err := e.readHeader(r)
	if err != nil {
		return err
	}

	const chunk = 512
	e.red = make([]float64, 0, chunk)
	e.ir = make([]float64, 0, chunk)
	if c.amb >= 0 {
		e.amb = make([]float64, 0, chunk)
	}
	e.est = make([]estimator.Estimate, 0, 16)

	// Rows are buffered until the rate is known (from --rate, or from the
	// first inferRows t_s values).
	var pendingT []float64
	rate := e.opts.rate
	lineNo := 1
	first := true
	for {
		if lineNo%4096 == 0 {
			if err := ctx.Err(); err != nil {
				return err
			}
		}
		rec, err := r.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return e.csvError(err)
		}
		lineNo, _ = r.FieldPos(0)
		rv, iv, av, tv, err := e.row(rec, c, lineNo)
		if err != nil {
			return err
		}
		if c.amb >= 0 {
			e.amb = append(e.amb, av)
		}
		if c.t >= 0 {
			if first {
				e.t0 = tv
			}
			if rate == 0 {
				pendingT = append(pendingT, tv)
			}
		}
		first = false
		e.red = append(e.red, rv)
		e.ir = append(e.ir, iv)
		if rate == 0 && len(pendingT) >= inferRows {
			if rate, err = inferRate(pendingT, lineNo); err != nil {
				return err
			}
		}
		// Start once a chunk is buffered, so the resolution check under
		// --adc-bits auto sees more than the first row.
		if rate != 0 && e.st == nil && len(e.red) >= chunk {
			if err := e.start(rate); err != nil {
				return err
			}
		}
		if e.st != nil && len(e.red) >= chunk {
			if err := e.flush(); err != nil {
				return err
			}
		}
	}
	if first {
		return e.writeHeader() // no samples: no seconds
	}
	return e.finish(rate, pendingT, lineNo)
}

// estimateColumns are the indices of the input columns 'estimate' reads;
// amb and t are -1 when the input has none.
type estimateColumns struct {
	header          []string
	red, ir, amb, t int
}

// readHeader reads the header row and finds the columns the options name.
func (e *estimateRun) readHeader(r *csv.Reader) (estimateColumns, error) {
	var c estimateColumns
	header, err := r.Read()
	if err == io.EOF {
		return c, fmt.Errorf("%s: empty input, want a header row with columns %s and %s", e.name, e.opts.redCol, e.opts.irCol)
	}
	if err != nil {
		return c, e.csvError(err)
	}
	header = append([]string(nil), header...) // ReuseRecord: keep our own copy
	c.header = header
	col := map[string]int{}
	for i, h := range header {
		h = strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))
		if _, dup := col[h]; !dup {
			col[h] = i
		}
	}
	need := func(name, flag string) (int, error) {
		i, ok := col[name]
		if !ok {
			return 0, fmt.Errorf("%s line 1: no column %q (%s); the header has %s", e.name, name, flag, strings.Join(header, ","))
		}
		return i, nil
	}
	if c.red, err = need(e.opts.redCol, "--red-col"); err != nil {
		return c, err
	}
	if c.ir, err = need(e.opts.irCol, "--ir-col"); err != nil {
		return c, err
	}
	c.amb = -1
	if e.opts.ambientCol != "" {
		if c.amb, err = need(e.opts.ambientCol, "--ambient-col"); err != nil {
			return c, err
		}
	}
	tI, hasT := col["t_s"]
	if !hasT {
		tI = -1
	}
	c.t = tI
	if e.opts.rate == 0 && !hasT {
		return c, usagef("--rate: required when the input has no t_s column")
	}
	return c, nil
}

// row reads one sample's fields: red, ir, and ambient and t_s when the
// input has those columns (else 0).
func (e *estimateRun) row(rec []string, c estimateColumns, lineNo int) (red, ir, amb, t float64, err error) {
	if red, err = e.number(rec, c.red, lineNo, c.header); err != nil {
		return
	}
	if ir, err = e.number(rec, c.ir, lineNo, c.header); err != nil {
		return
	}
	if c.amb >= 0 {
		if amb, err = e.number(rec, c.amb, lineNo, c.header); err != nil {
			return
		}
	}
	if c.t >= 0 {
		t, err = e.number(rec, c.t, lineNo, c.header)
	}
	return
}

// finish handles the end of the input: infers the rate if still unknown,
// starts the stream if a chunk never filled, and writes the last seconds.
func (e *estimateRun) finish(rate float64, pendingT []float64, lineNo int) error {
	var err error
	if rate == 0 {
		if rate, err = inferRate(pendingT, lineNo); err != nil {
			return err
		}
	}
	if e.st == nil {
		if err := e.start(rate); err != nil {
			return err
		}
	}
	if err := e.flush(); err != nil {
		return err
	}
	e.progress(-1, true)
	return nil
}

// start creates the stream and writes the header.
func (e *estimateRun) start(rate float64) error {
	if e.opts.rate == 0 && checkRate(rate, "") != nil {
		return fmt.Errorf("%s: sample rate inferred from t_s is %v Hz, want %v..%v Hz (set --rate to override)",
			e.name, rate, estimator.MinSampleRateHz, estimator.MaxSampleRateHz)
	}
	bits := e.resolveADCBits()
	st, err := estimator.New(estimator.Config{SampleRateHz: rate, ADCBits: bits, Calibration: e.cal, AveragingS: e.window, Ratio: estimator.RatioMethod(e.opts.ratio)})
	if err != nil {
		return err
	}
	e.st = st
	return e.writeHeader()
}

// writeHeader writes the output header (the CSV contract, plus flags on
// request).
func (e *estimateRun) writeHeader() error {
	hdr := "t_s,spo2_pct,pulse_bpm,pi_pct,sqi,ratio"
	if e.opts.flags {
		hdr += ",flags"
	}
	_, err := e.w.WriteString(caution.Comment + hdr + "\n")
	return err
}

// flush pushes the buffered samples and writes the completed seconds.
func (e *estimateRun) flush() error {
	var amb []float64
	if e.amb != nil {
		amb = e.amb
	}
	e.est = e.st.Push(e.red, e.ir, amb, e.est[:0])
	e.red, e.ir = e.red[:0], e.ir[:0]
	if e.amb != nil {
		e.amb = e.amb[:0]
	}
	for _, x := range e.est {
		e.count(x)
		b := e.line[:0]
		b = strconv.AppendFloat(b, e.t0+float64(x.Second), 'f', -1, 64)
		b = appendCell(b, x.SpO2Pct, 1)
		b = appendCell(b, x.PulseBPM, 1)
		b = appendCell(b, x.PIPct, 3)
		b = appendCell(b, x.SQI, 2)
		b = appendCell(b, x.Ratio, 4)
		if e.opts.flags {
			b = append(b, ',')
			b = append(b, x.Flags.String()...)
		}
		b = append(b, '\n')
		e.line = b
		if _, err := e.w.Write(b); err != nil {
			return fmt.Errorf("write output: %w", err)
		}
	}
	if n := len(e.est); n > 0 {
		e.progress(e.est[n-1].Second+1, false)
	}
	return nil
}

// appendCell appends ",value" with prec decimals, or "," alone for a
// withheld (NaN) value.
func appendCell(b []byte, v float64, prec int) []byte {
	b = append(b, ',')
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return b
	}
	return strconv.AppendFloat(b, v, 'f', prec, 64)
}

func (e *estimateRun) number(rec []string, i, line int, header []string) (float64, error) {
	if i >= len(rec) {
		return 0, fmt.Errorf("%s line %d, column %q: missing", e.name, line, header[i])
	}
	s := strings.TrimSpace(rec[i])
	v, err := strconv.ParseFloat(s, 64)
	if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		if s == "" {
			return 0, fmt.Errorf("%s line %d, column %q (field %d): empty, want a number (every row is one sample)", e.name, line, header[i], i+1)
		}
		return 0, fmt.Errorf("%s line %d, column %q (field %d): %q is not a finite number", e.name, line, header[i], i+1, s)
	}
	return v, nil
}

func (e *estimateRun) csvError(err error) error {
	var pe *csv.ParseError
	if errors.As(err, &pe) {
		return fmt.Errorf("%s line %d, column %d: %v", e.name, pe.Line, pe.Column, pe.Err)
	}
	return fmt.Errorf("read %s: %w", e.name, err)
}

// inferRate estimates the sample rate from t_s values: samples per second
// over the span, rounded to 0.01 Hz. t_s must increase.
func inferRate(t []float64, line int) (float64, error) {
	if len(t) < 2 {
		return 0, usagef("--rate: required (the input has too few t_s values to infer it)")
	}
	for i := 1; i < len(t); i++ {
		if !(t[i] > t[i-1]) {
			return 0, fmt.Errorf("t_s does not increase within the first %d rows (%v then %v); set --rate", len(t), t[i-1], t[i])
		}
	}
	r := float64(len(t)-1) / (t[len(t)-1] - t[0])
	return math.Round(r*100) / 100, nil
}

// progressWriter reports progress on w when it is a terminal and the input
// is large (over 20 MB), at most once a second; otherwise it does nothing.
func progressWriter(w io.Writer, size int64) func(seconds int64, done bool) {
	line := progress.New(w, time.Second)
	if !line.Terminal() || size < 20<<20 {
		return func(int64, bool) {}
	}
	return func(seconds int64, done bool) {
		if done {
			line.End("")
			return
		}
		line.Draw("estimate: %d s of signal done", seconds)
	}
}
