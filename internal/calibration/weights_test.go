package calibration

import (
	"bytes"
	"math"
	"strings"
	"testing"
)

// Weighted least squares with weight 1/2 on some pairs equals ordinary
// least squares with the others listed twice (the definition of weighted
// least squares; common practice).
func TestWeightedFitEqualsRepeatedPairs(t *testing.T) {
	// Off-line points so that weights matter: two clusters on different lines.
	a := pairsFrom([]float64{110, -25}, 0.4, 1.2, 9, "a")
	b := pairsFrom([]float64{104, -20}, 0.5, 1.4, 7, "b")
	var weighted, repeated []Pair
	for _, p := range a {
		repeated = append(repeated, p, p)
		weighted = append(weighted, p) // weight 1 (unset)
	}
	for _, p := range b {
		repeated = append(repeated, p)
		p.Weight = 0.5
		weighted = append(weighted, p)
	}
	for _, model := range []string{Linear, Quadratic} {
		w, err := FitCoefficients(weighted, model)
		if err != nil {
			t.Fatal(err)
		}
		r, err := FitCoefficients(repeated, model)
		if err != nil {
			t.Fatal(err)
		}
		for i := range w {
			if math.Abs(w[i]-r[i]) > 1e-9 {
				t.Errorf("%s: weighted %v, repeated %v", model, w, r)
				break
			}
		}
	}
	if _, err := FitCoefficients([]Pair{{Ratio: 1, ReferencePct: 90, Weight: 1.5}, {Ratio: 2, ReferencePct: 80}}, Linear); err == nil || !strings.Contains(err.Error(), "weight") {
		t.Errorf("weight 1.5: error %v, want one naming weight and its bound", err)
	}
}

func TestPairsWeightColumnRoundTrips(t *testing.T) {
	in := []Pair{{Ratio: 0.5, ReferencePct: 97, Subject: "s1", Weight: 0.75}, {Ratio: 1, ReferencePct: 85, Subject: "s2"}}
	var b bytes.Buffer
	if err := WritePairs(&b, in); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "\nratio,reference_pct,subject,weight\n") {
		t.Errorf("header: %q", b.String())
	}
	back, err := ReadPairs(&b)
	if err != nil {
		t.Fatal(err)
	}
	// An unset weight is written as 1, which fits the same.
	if back[0] != in[0] || back[1].Weight != 1 || back[1].Ratio != 1 {
		t.Errorf("read back %+v, want %+v (second weight 1)", back, in)
	}
	if _, err := ReadPairs(strings.NewReader("ratio,reference_pct,weight\n0.5,97,-1\n")); err == nil || !strings.Contains(err.Error(), "line 2: weight") {
		t.Errorf("negative weight: error %v, want one naming line 2 and weight", err)
	}
	// Without weights nothing changes in the file.
	b.Reset()
	if err := WritePairs(&b, []Pair{{Ratio: 0.5, ReferencePct: 97}}); err != nil {
		t.Fatal(err)
	}
	if !strings.HasSuffix(b.String(), "\nratio,reference_pct\n0.5,97\n") {
		t.Errorf("unweighted file: %q", b.String())
	}
}

func TestWeightedMedian(t *testing.T) {
	// Worked by hand: sorted 1 (w 1), 2 (w 1), 10 (w 3): total 5, half 2.5,
	// cumulative 1, 2, 5 -> 10. Equal weights give the lower median.
	if m := weightedMedian([]float64{10, 1, 2}, []float64{3, 1, 1}); m != 10 {
		t.Errorf("weighted median %v, want 10", m)
	}
	if m := weightedMedian([]float64{4, 1, 3, 2}, []float64{1, 1, 1, 1}); m != 2 {
		t.Errorf("equal weights: %v, want 2 (lower median)", m)
	}
}

// With QualityWeights a window's pair weighs its mean SQI times the share of
// good seconds, and its ratio leans to the better seconds.
func TestAlignQualityWeights(t *testing.T) {
	dev, ref := session()
	for i := 0; i < 20; i++ {
		if i < 5 {
			dev[i].SQI = 0.2 // below MinSQI: not counted
		} else if i < 12 {
			dev[i].SQI, dev[i].Ratio = 0.55, 2 // poor but counted, and off
		}
	}
	pairs, _, err := Align(dev, ref, AlignOptions{WindowS: 20, QualityWeights: true})
	if err != nil {
		t.Fatal(err)
	}
	// First window: 7 s at SQI 0.55 and 8 s at 0.9 count; weight
	// (7 x 0.55 + 8 x 0.9) / 20 = 0.5525. The 0.9 seconds outweigh (7.2 vs
	// 3.85), so the ratio is theirs, where the plain median would be too.
	p := pairs[0]
	if math.Abs(p.Weight-0.5525) > 1e-12 || math.Abs(p.Ratio-(110-97.0)/25) > 1e-12 {
		t.Errorf("first window: %+v, want weight 0.5525 and ratio %v", p, (110-97.0)/25)
	}
	if w := pairs[1].Weight; math.Abs(w-0.9) > 1e-12 {
		t.Errorf("second window: weight %v, want 0.9 (all 20 s at SQI 0.9)", w)
	}
	plain, _, _ := Align(dev, ref, AlignOptions{WindowS: 20})
	if plain[0].Weight != 0 {
		t.Errorf("without QualityWeights: weight %v, want 0 (unweighted)", plain[0].Weight)
	}
}
