package calibration

import (
	"fmt"
	"math"
)

// Decade is the accuracy over one band of reference saturation.
type Decade struct {
	LowPct, HighPct float64 // reference band [LowPct, HighPct); the top band includes 100
	N               int     // pairs with the reference in the band
	BiasPct         float64 // mean difference (predicted - reference), %; NaN when N == 0
	SDPct           float64 // population SD of the differences, %; NaN when N == 0
	ArmsPct         float64 // root mean square difference, %; NaN when N == 0
}

// Stats is the accuracy of predicted against reference saturation in the
// terms accuracy standards use. With d_i = predicted_i - reference_i:
// bias = mean(d), SD = population standard deviation of d (precision),
// Arms = sqrt(mean(d^2)), so Arms^2 = bias^2 + SD^2 (ISO 80601-2-61), and the
// Bland-Altman limits of agreement are bias -/+ 1.96 SD.
type Stats struct {
	N        int
	Subjects int
	BiasPct  float64
	SDPct    float64
	ArmsPct  float64
	MAEPct   float64
	LoALow   float64
	LoAHigh  float64
	// Arms70to100Pct is Arms over the pairs with reference 70..100 %, the
	// range accuracy standards state; N70to100 counts them.
	Arms70to100Pct float64
	N70to100       int
	RefMinPct      float64
	RefMaxPct      float64
	// Decades are 70-80, 80-90 and 90-100 % of reference saturation.
	Decades []Decade
}

// LoAFactor is the multiple of SD that gives the 95 % limits of agreement
// (Bland & Altman, Lancet 1986).
const LoAFactor = 1.96

// MinPairsPerDecade is the smallest count of pairs in a decade below which
// Warnings flags it (common practice: a handful of pairs says little).
const MinPairsPerDecade = 10

// decadeBands are the reference bands Arms is broken down by.
var decadeBands = [][2]float64{{70, 80}, {80, 90}, {90, 100}}

// Score computes Stats of predicted against reference (equal lengths, both
// in percent). subjects, when not nil, has one entry per pair and is only
// counted. Pairs with a NaN prediction are an error: decide what to do with
// withheld values before scoring.
func Score(predicted, reference []float64, subjects []string) (Stats, error) {
	if len(predicted) != len(reference) {
		return Stats{}, fmt.Errorf("score: %d predictions for %d references", len(predicted), len(reference))
	}
	if subjects != nil && len(subjects) != len(reference) {
		return Stats{}, fmt.Errorf("score: %d subjects for %d references", len(subjects), len(reference))
	}
	if len(reference) == 0 {
		return Stats{}, fmt.Errorf("score: no pairs")
	}
	for i := range predicted {
		if math.IsNaN(predicted[i]) || math.IsInf(predicted[i], 0) {
			return Stats{}, fmt.Errorf("score: predicted[%d] is %v, want a finite number", i, predicted[i])
		}
		if math.IsNaN(reference[i]) || math.IsInf(reference[i], 0) {
			return Stats{}, fmt.Errorf("score: reference[%d] is %v, want a finite number", i, reference[i])
		}
	}
	s := Stats{RefMinPct: math.Inf(1), RefMaxPct: math.Inf(-1)}
	seen := map[string]bool{}
	for _, sub := range subjects {
		if sub != "" && !seen[sub] {
			seen[sub] = true
		}
	}
	s.Subjects = len(seen)
	d := make([]float64, len(predicted))
	for i := range predicted {
		d[i] = predicted[i] - reference[i]
		s.RefMinPct = math.Min(s.RefMinPct, reference[i])
		s.RefMaxPct = math.Max(s.RefMaxPct, reference[i])
	}
	s.N = len(d)
	s.BiasPct, s.SDPct, s.ArmsPct, s.MAEPct = moments(d)
	s.LoALow = s.BiasPct - LoAFactor*s.SDPct
	s.LoAHigh = s.BiasPct + LoAFactor*s.SDPct
	var in []float64
	for i, r := range reference {
		if r >= 70 && r <= 100 {
			in = append(in, d[i])
		}
	}
	s.N70to100 = len(in)
	_, _, s.Arms70to100Pct, _ = moments(in)
	for _, b := range decadeBands {
		var db []float64
		for i, r := range reference {
			if r >= b[0] && (r < b[1] || b[1] == 100 && r <= 100) {
				db = append(db, d[i])
			}
		}
		dec := Decade{LowPct: b[0], HighPct: b[1], N: len(db)}
		dec.BiasPct, dec.SDPct, dec.ArmsPct, _ = moments(db)
		s.Decades = append(s.Decades, dec)
	}
	return s, nil
}

// moments returns the mean, population SD, root mean square and mean
// absolute value of d; all NaN for an empty d. Arms is computed from d^2
// directly, not from bias and SD, so the identity between them is a check.
func moments(d []float64) (mean, sd, rms, mae float64) {
	if len(d) == 0 {
		return math.NaN(), math.NaN(), math.NaN(), math.NaN()
	}
	n := float64(len(d))
	var sum, sq, abs float64
	for _, v := range d {
		sum += v
		sq += v * v
		abs += math.Abs(v)
	}
	mean = sum / n
	var ss float64
	for _, v := range d {
		ss += (v - mean) * (v - mean)
	}
	return mean, math.Sqrt(ss / n), math.Sqrt(sq / n), abs / n
}

// Warnings lists what makes the stats weak evidence: decades with fewer
// than MinPairsPerDecade pairs, and a reference range that does not reach
// within 2 % of both ends of 70-100 %.
func (s Stats) Warnings() []string {
	var w []string
	for _, d := range s.Decades {
		if d.N < MinPairsPerDecade {
			w = append(w, fmt.Sprintf("decade %.0f-%.0f %%: %d pairs, want >= %d for a meaningful Arms", d.LowPct, d.HighPct, d.N, MinPairsPerDecade))
		}
	}
	if s.N > 0 && (s.RefMinPct > 72 || s.RefMaxPct < 98) {
		w = append(w, fmt.Sprintf("reference range %.1f-%.1f %% does not cover 70-100 %% (accuracy standards state Arms over 70-100 %%)", s.RefMinPct, s.RefMaxPct))
	}
	return w
}
