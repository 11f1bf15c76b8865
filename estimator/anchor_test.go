package estimator

import (
	"math"
	"strconv"
	"strings"
	"testing"
)

// line is a calibration on the anchored ratio: SpO2 = 200 - 100 x.
type anchoredLine struct{ spec AnchorSpec }

func (l anchoredLine) SpO2(x float64) (float64, bool) {
	return math.Min(100, 200-100*x), x > 0 && x < 2
}
func (l anchoredLine) AnchorSpec() AnchorSpec { return l.spec }
func (l anchoredLine) String() string         { return "test line" }

func est(sec int64, ratio, sqi float64) TimedEstimate {
	return TimedEstimate{TimeMS: 1_000_000 + (sec+1)*1000, Estimate: Estimate{Second: sec, Ratio: ratio, SQI: sqi, SpO2Pct: 97}}
}

// A stream refuses a calibration on the anchored ratio, naming the field.
func TestConfigRefusesAnchoredCalibration(t *testing.T) {
	cal := anchoredLine{AnchorSpec{LengthS: 60, MinSQI: 0.5, MinSeconds: 10}}
	_, err := New(Config{SampleRateHz: 100, Calibration: cal})
	if err == nil || !strings.Contains(err.Error(), "input: anchored_ratio") || !strings.Contains(err.Error(), "Calibration") {
		t.Fatalf("New with an anchored calibration: %v, want a refusal naming input: anchored_ratio", err)
	}
	if _, err := NewTimeline(Config{Calibration: cal}); err == nil {
		t.Fatal("NewTimeline accepted an anchored calibration")
	}
	if _, err := NewAnchor(Empirical()); err == nil {
		t.Fatal("NewAnchor accepted a raw-ratio calibration")
	}
	if _, err := NewAnchor(anchoredLine{AnchorSpec{LengthS: 60, MinSQI: 0.1, MinSeconds: 10}}); err == nil || !strings.Contains(err.Error(), "anchor_min_sqi") {
		t.Fatalf("NewAnchor with MinSQI 0.1: %v, want an error naming anchor_min_sqi", err)
	}
}

// Until the anchor is complete SpO2 is withheld with FlagAnchoring; then
// it is the curve at R/R0, R0 the median of the usable ratios of the
// anchor's span counted from the first usable second.
func TestAnchorPhases(t *testing.T) {
	a, err := NewAnchor(anchoredLine{AnchorSpec{LengthS: 20, MinSQI: 0.5, MinSeconds: 5}})
	if err != nil {
		t.Fatal(err)
	}
	var sec int64
	// 3 s without a usable ratio: the anchor has not started.
	for ; sec < 3; sec++ {
		e := est(sec, math.NaN(), 0)
		a.Apply(&e)
		if !math.IsNaN(e.SpO2Pct) || !e.Flags.Has(FlagAnchoring) || a.Status() != "calibration anchor in progress, 0 s of 20" {
			t.Fatalf("second %d: SpO2 %v flags %v status %q", sec, e.SpO2Pct, e.Flags, a.Status())
		}
	}
	// 20 s of anchor: ratios 0.8..1.2 (median 1.0) with a low-quality outlier.
	for i := 0; i < 20; i++ {
		r, q := 0.8+0.4*float64(i%5)/4, 0.9
		if i == 7 {
			r, q = 5, 0.4 // not usable: does not enter the median
		}
		e := est(sec, r, q)
		sec++
		a.Apply(&e)
		if !math.IsNaN(e.SpO2Pct) || !e.Flags.Has(FlagAnchoring) {
			t.Fatalf("anchor second %d: SpO2 %v flags %v, want withheld with anchoring", i, e.SpO2Pct, e.Flags)
		}
		if want := "calibration anchor in progress, " + strconv.Itoa(i+1) + " s of 20"; a.Status() != want {
			t.Fatalf("anchor second %d: status %q, want %q", i, a.Status(), want)
		}
	}
	e := est(sec, 0.9, 0.9)
	a.Apply(&e)
	if r0, ok := a.R0(); !ok || math.Abs(r0-1) > 1e-12 {
		t.Fatalf("R0 = %v %v, want 1", r0, ok)
	}
	if e.SpO2Pct != 100 || e.Flags.Has(FlagAnchoring) || a.Status() != "" {
		t.Fatalf("after the anchor: SpO2 %v flags %v status %q", e.SpO2Pct, e.Flags, a.Status())
	}
	e = est(sec+1, 1.05, 0.9)
	a.Apply(&e)
	if math.Abs(e.SpO2Pct-95) > 1e-9 {
		t.Fatalf("R/R0 = 1.05: SpO2 %v, want 95", e.SpO2Pct)
	}
	// A Timeline restart (Second from 0 again, device time going on) keeps it.
	e = TimedEstimate{TimeMS: est(sec+2, 0, 0).TimeMS, Estimate: Estimate{Second: 0, Ratio: 1.1, SQI: 0.9}}
	a.Apply(&e)
	if math.Abs(e.SpO2Pct-90) > 1e-9 {
		t.Fatalf("after a restart of the stream: SpO2 %v, want 90 (anchor kept)", e.SpO2Pct)
	}
	// The probe off for AnchorResetOffS s starts a new anchor.
	for i := 0; i < AnchorResetOffS; i++ {
		e = est(sec+3+int64(i), math.NaN(), 0)
		e.Flags = FlagSensorOff
		a.Apply(&e)
	}
	if _, ok := a.R0(); ok {
		t.Fatal("anchor kept after the sensor was off for AnchorResetOffS s")
	}
}

// Too few usable seconds in the span: the anchor starts over.
func TestAnchorStartsOver(t *testing.T) {
	a, _ := NewAnchor(anchoredLine{AnchorSpec{LengthS: 10, MinSQI: 0.5, MinSeconds: 5}})
	for sec := int64(0); sec < 10; sec++ {
		q := 0.1
		if sec%4 == 0 {
			q = 0.9
		}
		e := est(sec, 1, q)
		a.Apply(&e)
	}
	e := est(10, 1, 0.9)
	a.Apply(&e)
	if _, ok := a.R0(); ok || a.Starts() != 2 || !e.Flags.Has(FlagAnchoring) {
		t.Fatalf("3 usable seconds of 5 needed: R0 ok %v starts %d flags %v, want a second start", ok, a.Starts(), e.Flags)
	}
}

func BenchmarkAnchorApply(b *testing.B) {
	a, _ := NewAnchor(anchoredLine{AnchorSpec{LengthS: 60, MinSQI: 0.5, MinSeconds: 10}})
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		e := est(int64(i), 0.9+0.01*float64(i%7), 0.9)
		a.Apply(&e)
	}
}
