package calibration

import (
	"math"
	"strings"
	"testing"
)

// Subjects a, b, c, d on SpO2 = 110 - 25 R (docs/references.md "The empirical calibration line",
// common practice) under candidate "clean"; candidate "scrambled" gives the
// same references with ratios that carry nothing (reversed order within
// each subject, so the pooled ratio range is the same).
func selectionCandidates() (clean, scrambled Candidate) {
	line := []float64{110, -25}
	clean.Name, scrambled.Name = "clean", "scrambled"
	for i, s := range []string{"a", "b", "c", "d"} {
		lo := 0.4 + 0.05*float64(i)
		ps := pairsFrom(line, lo, lo+1, 20, s)
		clean.Pairs = append(clean.Pairs, ps...)
		for j := range ps {
			q := ps[j]
			q.Ratio = ps[len(ps)-1-j].Ratio
			if j%2 == 0 {
				q.Ratio = ps[j].Ratio // half right, half reversed: a weak, misleading ratio
			}
			scrambled.Pairs = append(scrambled.Pairs, q)
		}
	}
	return clean, scrambled
}

func TestNestedLeaveOneSubjectOutChoosesOnTrainingSubjectsOnly(t *testing.T) {
	clean, scrambled := selectionCandidates()
	n, err := NestedLeaveOneSubjectOut([]Candidate{scrambled, clean}, Linear)
	if err != nil {
		t.Fatal(err)
	}
	if len(n.Folds) != 4 {
		t.Fatalf("%d folds, want 4", len(n.Folds))
	}
	for _, f := range n.Folds {
		if f.Chosen != "clean" {
			t.Errorf("held out %s: chose %q, want clean (exact on every training subject)", f.Subject, f.Chosen)
		}
		if f.Fit.MAEPct > 1e-9 || math.Abs(f.InnerMAEPct) > 1e-9 {
			t.Errorf("held out %s: fit MAE %v inner %v, want 0 (all subjects on one line)", f.Subject, f.Fit.MAEPct, f.InnerMAEPct)
		}
	}
	if n.Improvement() < 0.99 {
		t.Errorf("improvement over the mean predictor %.3f, want ~1", n.Improvement())
	}

	// The held-out subject must not influence the choice: make "scrambled"
	// exact on subject d alone and worse elsewhere; the fold that holds out
	// d still sees only a, b, c and must choose as before.
	var tricky Candidate
	tricky.Name = "exact-on-d"
	for i, p := range scrambled.Pairs {
		if p.Subject == "d" {
			p = clean.Pairs[i]
		}
		tricky.Pairs = append(tricky.Pairs, p)
	}
	n2, err := NestedLeaveOneSubjectOut([]Candidate{tricky, clean}, Linear)
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range n2.Folds {
		if f.Subject == "d" && f.Chosen != "clean" {
			t.Errorf("held out d: chose %q, want clean: the held-out subject's pairs leaked into the choice", f.Chosen)
		}
	}
}

// A candidate that gives no pairs for a training subject (its method failed
// on that person) is never chosen; if the held-out subject has no pairs
// under the chosen candidate the fold says so.
func TestNestedLeaveOneSubjectOutCoverage(t *testing.T) {
	clean, _ := selectionCandidates()
	var partial Candidate
	partial.Name = "no-pairs-for-b"
	for _, p := range clean.Pairs {
		if p.Subject != "b" {
			partial.Pairs = append(partial.Pairs, p)
		}
	}
	best, scores, err := SelectCandidate([]Candidate{partial, clean}, []string{"a", "b", "c"}, Linear)
	if err != nil {
		t.Fatal(err)
	}
	if best != 1 || scores[0].Qualified {
		t.Errorf("chose %d (scores %+v), want 1: the partial candidate lacks subject b", best, scores)
	}
	n, err := NestedLeaveOneSubjectOut([]Candidate{partial, clean}, Linear)
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range n.Folds {
		// Holding out b, both candidates are exact on a, c, d and the tie
		// goes to the first, which has no pairs for b: withheld, not scored.
		want, withheld := "clean", false
		if f.Subject == "b" {
			want, withheld = "no-pairs-for-b", true
		}
		if f.Chosen != want || f.Withheld != withheld || (withheld && f.Fit.N != 0) {
			t.Errorf("held out %s: chose %q withheld %v (n %d), want %q withheld %v", f.Subject, f.Chosen, f.Withheld, f.Fit.N, want, withheld)
		}
	}
	if n.Pooled.N != 60 {
		t.Errorf("pooled n %d, want 60 (b withheld)", n.Pooled.N)
	}
	if _, err := NestedLeaveOneSubjectOut([]Candidate{{Name: "x", Pairs: clean.Pairs[:40]}}, Linear); err == nil || !strings.Contains(err.Error(), ">= 3") {
		t.Errorf("two subjects: error %v, want one naming the bound", err)
	}
}
