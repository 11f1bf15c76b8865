package calibration

import (
	"math"
	"strings"
	"testing"
)

// seconds builds a recording: NaN (withheld) for the first skip seconds,
// then ratio r(k) with SQI 0.9.
func seconds(n, skip int, r func(k int) float64) []DeviceSecond {
	out := make([]DeviceSecond, n)
	for k := range out {
		out[k] = DeviceSecond{Second: int64(k), Ratio: math.NaN()}
		if k >= skip {
			out[k].Ratio, out[k].SQI = r(k), 0.9
		}
	}
	return out
}

// Two people on the same saturation course whose ratios differ by a factor
// (skin, probe placement): the anchor divides it out, so their anchored
// ratios agree second by second.
func TestAnchorRemovesAPersonsFactor(t *testing.T) {
	course := func(k int) float64 { return 0.5 + 0.002*math.Max(0, float64(k-120)) } // flat for 2 min, then R rises
	a := seconds(600, 5, course)
	b := seconds(600, 5, func(k int) float64 { return 1.3 * course(k) })
	ra, na, oka, err := Anchor(a, AnchorOptions{LengthS: 60})
	if err != nil || !oka {
		t.Fatalf("anchor a: %v ok %v", err, oka)
	}
	rb, _, okb, _ := Anchor(b, AnchorOptions{LengthS: 60})
	if !okb || math.Abs(ra-0.5) > 1e-12 || math.Abs(rb-0.65) > 1e-12 || na != 60 {
		t.Fatalf("anchors %v (n %d) and %v, want 0.5 (60 s) and 0.65", ra, na, rb)
	}
	aa, ab := Anchored(a, ra), Anchored(b, rb)
	for k := range aa {
		if math.IsNaN(aa[k].Ratio) != math.IsNaN(ab[k].Ratio) || (!math.IsNaN(aa[k].Ratio) && math.Abs(aa[k].Ratio-ab[k].Ratio) > 1e-12) {
			t.Fatalf("second %d: anchored %v and %v differ", k, aa[k].Ratio, ab[k].Ratio)
		}
	}
}

// Version 1 of the protocol anchors at the recording's start, version 2 at
// its first usable second; too few usable seconds give no anchor.
func TestAnchorStartAndMinimum(t *testing.T) {
	dev := seconds(600, 250, func(k int) float64 { return 0.4 + 0.001*float64(k) })
	if _, n, ok, _ := Anchor(dev, AnchorOptions{LengthS: 120, AtRecordingStart: true}); ok || n != 0 {
		t.Errorf("from the start: ok %v n %d, want no anchor (nothing usable in 0-119 s)", ok, n)
	}
	r0, n, ok, _ := Anchor(dev, AnchorOptions{LengthS: 60})
	if !ok || n != 60 || math.Abs(r0-(0.4+0.001*279.5)) > 1e-12 {
		t.Errorf("from the first usable second: r0 %v n %d ok %v, want the median of 250-309 s", r0, n, ok)
	}
	short := seconds(600, 595, func(int) float64 { return 0.5 })
	if _, n, ok, _ := Anchor(short, AnchorOptions{LengthS: 60}); ok || n != 5 {
		t.Errorf("5 usable seconds: ok %v n %d, want no anchor (minimum 10)", ok, n)
	}
	if _, _, _, err := Anchor(dev, AnchorOptions{}); err == nil || !strings.Contains(err.Error(), "LengthS") {
		t.Errorf("no length: error %v, want one naming LengthS", err)
	}
}

// NestedOver keeps a subject that no candidate gave pairs: its fold is
// withheld, not silently dropped; and a pair of a subject outside the list
// is an error.
func TestNestedOverReportsSubjectsWithoutPairs(t *testing.T) {
	clean, _ := selectionCandidates()
	n, err := NestedOver([]Candidate{clean}, []string{"a", "b", "c", "d", "e"}, Linear, func(train []string) (Choice, error) {
		return Choice{Index: 0, Why: "only one", InnerMAEPct: math.NaN()}, nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(n.Folds) != 5 || !n.Folds[4].Withheld || n.Folds[4].Subject != "e" {
		t.Fatalf("folds %+v, want five with e withheld", n.Folds)
	}
	if _, err := NestedOver([]Candidate{clean}, []string{"a", "b", "c"}, Linear, InnerLOSO([]Candidate{clean}, Linear)); err == nil || !strings.Contains(err.Error(), `"d"`) {
		t.Errorf("subject d not listed: error %v, want one naming it", err)
	}
}
