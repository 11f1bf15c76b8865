package pairing

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// Options say how to read a recording and what counts as a stable stretch.
type Options struct {
	// RateHz is the raw sample rate per channel; required (the estimator's
	// bounds apply: 25..1000 Hz).
	RateHz float64
	// RedCol and IRCol name the first (red) and second (infrared) channel
	// columns of the raw CSV; "" = "red" and "ir". For other sensors any two
	// channels, e.g. "r" and "b" of a camera.
	RedCol, IRCol string
	// ADCBits is the converter resolution; 0 = unknown (float inputs);
	// estimator.ADCBitsAuto chooses from the samples (estimator.ResolveADCBits),
	// as the estimate command does by default.
	ADCBits int
	// AveragingS is the estimator's averaging window in seconds; 0 = the
	// estimator's default.
	AveragingS float64
	// Ratio is the estimator's ratio method; "" = its default (the
	// regression slope of the band-passed channels over each beat).
	Ratio estimator.RatioMethod
	// Align chooses windows and stability checks; its Subject names the
	// pairs.
	Align calibration.AlignOptions
	// AnchorAtRecordingStart starts an anchored variant's room-air anchor
	// at the recording's first second (docs/calibration-protocol.md,
	// version 1) rather than at its first usable second (version 2).
	AnchorAtRecordingStart bool
	// AnchorS > 0 divides the recording's ratios by its room-air anchor
	// over AnchorS seconds (calibration.Anchor, SQI >= Align.MinSQI, at
	// least AnchorMinSeconds usable seconds, 0 = MinAnchorSeconds), for a
	// curve on the anchored ratio; 0 = raw ratio. FromRecording only.
	AnchorS, AnchorMinSeconds int
	// ReferenceSubject selects the reference file's rows by its subject (or
	// device) column; "" = the file names at most one.
	ReferenceSubject string
}

// Raw is a two-channel recording.
type Raw struct {
	Red, IR []float64
}

// ReadRaw reads the estimate input CSV (CONTRACT): a header row, the two
// channel columns by name, other columns ignored. Every row needs both
// channel values; an error names the line and the column.
func ReadRaw(r io.Reader, redCol, irCol string) (Raw, error) {
	if redCol == "" {
		redCol = "red"
	}
	if irCol == "" {
		irCol = "ir"
	}
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	cr.Comment = '#' // the caution line pulsefleet writes atop its CSV files
	header, err := cr.Read()
	if err != nil {
		return Raw{}, fmt.Errorf("raw: header: %w", noEOF(err))
	}
	ri, ii := colIndex(header, redCol), colIndex(header, irCol)
	if ri < 0 || ii < 0 {
		return Raw{}, fmt.Errorf("raw: header %q: want columns %q and %q", strings.Join(header, ","), redCol, irCol)
	}
	var raw Raw
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return Raw{}, fmt.Errorf("raw: %w", err)
		}
		line, _ := cr.FieldPos(0)
		rv, err := number(rec, ri)
		if err != nil {
			return Raw{}, fmt.Errorf("raw: line %d: %s: %w", line, redCol, err)
		}
		iv, err := number(rec, ii)
		if err != nil {
			return Raw{}, fmt.Errorf("raw: line %d: %s: %w", line, irCol, err)
		}
		raw.Red = append(raw.Red, rv)
		raw.IR = append(raw.IR, iv)
	}
	if len(raw.Red) == 0 {
		return Raw{}, errors.New("raw: no samples after the header")
	}
	return raw, nil
}

// ReadReference reads a reference file: a header row with t_s (seconds on
// the raw recording's clock: the reading at t_s belongs to the one-second
// window floor(t_s)) and the reference saturation in spo2_ref_pct (or
// reference_pct), optionally subject or device. An empty saturation cell is
// a missing reading. When the file names subjects, subject selects the rows
// (required if there are several).
func ReadReference(r io.Reader, subject string) ([]calibration.ReferenceSecond, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.Comment = '#' // the caution line pulsefleet writes atop its CSV files
	header, err := cr.Read()
	if err != nil {
		return nil, fmt.Errorf("reference: header: %w", noEOF(err))
	}
	ti := colIndex(header, "t_s")
	si := colIndex(header, "spo2_ref_pct")
	if si < 0 {
		si = colIndex(header, "reference_pct")
	}
	wi := colIndex(header, "subject")
	if wi < 0 {
		wi = colIndex(header, "device")
	}
	if ti < 0 || si < 0 {
		return nil, fmt.Errorf("reference: header %q: want columns t_s and spo2_ref_pct (or reference_pct), optionally subject or device", strings.Join(header, ","))
	}
	var out []calibration.ReferenceSecond
	seen := map[string]bool{}
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("reference: %w", err)
		}
		line, _ := cr.FieldPos(0)
		if wi >= 0 {
			who := cell(rec, wi)
			seen[who] = true
			if subject != "" && who != subject {
				continue
			}
		}
		t, err := number(rec, ti)
		if err != nil {
			return nil, fmt.Errorf("reference: line %d: t_s: %w", line, err)
		}
		if t < 0 || t > 1e9 {
			return nil, fmt.Errorf("reference: line %d: t_s: %v, want 0..1e9 s", line, t)
		}
		v := math.NaN()
		if cell(rec, si) != "" {
			if v, err = number(rec, si); err != nil {
				return nil, fmt.Errorf("reference: line %d: %s: %w", line, header[si], err)
			}
			if v < 0 || v > 100 {
				return nil, fmt.Errorf("reference: line %d: %s: %v, want 0..100", line, header[si], v)
			}
		}
		out = append(out, calibration.ReferenceSecond{Second: int64(math.Floor(t)), SpO2Pct: v})
	}
	if wi >= 0 && subject == "" && len(seen) > 1 {
		return nil, fmt.Errorf("reference: %s: %d different values, name the one to use", header[wi], len(seen))
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("reference: no rows (for subject %q)", subject)
	}
	return out, nil
}

// DeviceSeconds runs the estimator over a recording and returns its
// per-second ratio and signal quality.
func DeviceSeconds(raw Raw, o Options) ([]calibration.DeviceSecond, error) {
	bits, _ := estimator.ResolveADCBits(o.ADCBits, raw.Red, raw.IR)
	s, err := estimator.New(estimator.Config{SampleRateHz: o.RateHz, ADCBits: bits, AveragingS: o.AveragingS, Ratio: o.Ratio})
	if err != nil {
		return nil, fmt.Errorf("estimator: %w", err)
	}
	var est []estimator.Estimate
	const chunk = 256
	for i := 0; i < len(raw.Red); i += chunk {
		j := min(i+chunk, len(raw.Red), len(raw.IR))
		if j <= i {
			break
		}
		est = s.Push(raw.Red[i:j], raw.IR[i:j], nil, est)
	}
	out := make([]calibration.DeviceSecond, len(est))
	for i, e := range est {
		out[i] = calibration.DeviceSecond{Second: e.Second, Ratio: e.Ratio, SQI: e.SQI}
	}
	return out, nil
}

// FromRecording reads a raw recording and its reference and returns the
// pairs of its stable stretches and what was dropped.
func FromRecording(raw, ref io.Reader, o Options) ([]calibration.Pair, calibration.AlignReport, error) {
	rw, err := ReadRaw(raw, o.RedCol, o.IRCol)
	if err != nil {
		return nil, calibration.AlignReport{}, err
	}
	rs, err := ReadReference(ref, o.ReferenceSubject)
	if err != nil {
		return nil, calibration.AlignReport{}, err
	}
	dev, err := DeviceSeconds(rw, o)
	if err != nil {
		return nil, calibration.AlignReport{}, err
	}
	if o.AnchorS > 0 {
		a, err := alignDefaults(o.Align)
		if err != nil {
			return nil, calibration.AlignReport{}, err
		}
		return alignVariant(dev, Recording{Subject: o.Align.Subject, Reference: rs}, Variant{AnchorS: o.AnchorS, LagS: o.Align.ReferenceLagS}, o, a.MinSQI)
	}
	return calibration.Align(dev, rs, o.Align)
}

// AnchorSpec is the anchor FromRecording divides by under o (LengthS 0:
// none), as a curve file records it.
func (o Options) AnchorSpec() estimator.AnchorSpec {
	if o.AnchorS == 0 {
		return estimator.AnchorSpec{}
	}
	minSQI := o.Align.MinSQI
	if minSQI == 0 {
		minSQI = 0.5
	}
	return estimator.AnchorSpec{LengthS: o.AnchorS, MinSQI: minSQI, MinSeconds: o.minAnchorSeconds()}
}

func (o Options) minAnchorSeconds() int {
	if o.AnchorMinSeconds == 0 {
		return MinAnchorSeconds
	}
	return o.AnchorMinSeconds
}

func colIndex(header []string, name string) int {
	for i, h := range header {
		if strings.EqualFold(strings.TrimSpace(strings.TrimPrefix(h, "\ufeff")), name) {
			return i
		}
	}
	return -1
}

func cell(rec []string, i int) string {
	if i < len(rec) {
		return strings.TrimSpace(rec[i])
	}
	return ""
}

func number(rec []string, i int) (float64, error) {
	s := cell(rec, i)
	if s == "" {
		return 0, errors.New("empty cell, want a number")
	}
	v, err := strconv.ParseFloat(s, 64)
	if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, fmt.Errorf("%q is not a finite number", s)
	}
	return v, nil
}

func noEOF(err error) error {
	if errors.Is(err, io.EOF) {
		return errors.New("empty input")
	}
	return err
}
