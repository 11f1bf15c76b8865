package calibration

import (
	"fmt"
	"math"
	"slices"
)

// Candidate is one way of turning the same recordings into pairs: a choice
// of channels, ratio method, reference lag and so on that model selection
// makes. Every candidate's pairs carry subjects.
type Candidate struct {
	Name  string
	Pairs []Pair
}

// CandidateScore is a candidate's leave-one-subject-out score on some
// subjects.
type CandidateScore struct {
	Name string
	// Qualified is false when the candidate has no pairs from one of the
	// subjects (its method failed on that person); it is then never chosen.
	Qualified bool
	// MAEPct is the pooled leave-one-subject-out MAE; NaN when not qualified.
	MAEPct float64
}

// SelectCandidate scores every candidate by leave-one-subject-out over the
// given subjects (only their pairs are used) and returns the index of the
// one with the lowest pooled MAE among those that have pairs from every one
// of the subjects; ties go to the earlier candidate. It returns -1 when none
// qualifies.
func SelectCandidate(cands []Candidate, subjects []string, model string) (int, []CandidateScore, error) {
	if len(subjects) < 2 {
		return -1, nil, fmt.Errorf("select: %d subjects, want >= 2 for leave-one-subject-out", len(subjects))
	}
	best, bestMAE := -1, math.Inf(1)
	scores := make([]CandidateScore, len(cands))
	for i, c := range cands {
		scores[i] = CandidateScore{Name: c.Name, MAEPct: math.NaN()}
		var pairs []Pair
		have := map[string]bool{}
		for _, p := range c.Pairs {
			if slices.Contains(subjects, p.Subject) {
				pairs = append(pairs, p)
				have[p.Subject] = true
			}
		}
		if len(have) < len(subjects) {
			continue
		}
		l, err := LeaveOneSubjectOut(pairs, model)
		if err != nil {
			// Too few distinct ratios in some fold: the candidate cannot be
			// fitted on these subjects, so it does not qualify.
			continue
		}
		scores[i].Qualified, scores[i].MAEPct = true, l.Pooled.MAEPct
		if l.Pooled.MAEPct < bestMAE {
			best, bestMAE = i, l.Pooled.MAEPct
		}
	}
	return best, scores, nil
}

// NestedFold is one outer fold of a nested leave-one-subject-out
// evaluation.
type NestedFold struct {
	// Subject is held out; Chosen names the candidate selected on the other
	// subjects alone and Why says by what (for the inner
	// leave-one-subject-out, its pooled MAE there, also in InnerMAEPct;
	// NaN for other choosers).
	Subject     string
	Chosen      string
	Why         string
	InnerMAEPct float64
	// Coefficients of the curve fitted to the other subjects' pairs of the
	// chosen candidate.
	Coefficients []float64
	// Fit and Baseline score the curve and the other subjects' mean
	// reference on the held-out subject's pairs of the chosen candidate;
	// N = 0 when the chosen candidate gave this subject no pairs (Withheld).
	Fit, Baseline Stats
	Withheld      bool
}

// Nested is a nested leave-one-subject-out evaluation of a choice among
// candidates: in each outer fold the choice is made by an inner
// leave-one-subject-out on the training subjects alone, so the held-out
// subject never influences which candidate is scored on it.
type Nested struct {
	Model      string
	Candidates []string
	Folds      []NestedFold
	// Pooled and Baseline pool the held-out predictions and the mean
	// predictor over all folds.
	Pooled, Baseline Stats
}

// Choice is a Chooser's answer: the candidate's index, a short reason and,
// for InnerLOSO, the inner MAE (NaN otherwise).
type Choice struct {
	Index       int
	Why         string
	InnerMAEPct float64
}

// Chooser picks a candidate knowing only the training subjects of a fold;
// it must not look at any other subject's data.
type Chooser func(train []string) (Choice, error)

// InnerLOSO is the Chooser of NestedLeaveOneSubjectOut: the candidate with
// the lowest pooled leave-one-subject-out MAE on the training subjects
// among those with pairs from all of them (SelectCandidate).
func InnerLOSO(cands []Candidate, model string) Chooser {
	return func(train []string) (Choice, error) {
		best, scores, err := SelectCandidate(cands, train, model)
		if err != nil {
			return Choice{}, err
		}
		if best < 0 {
			return Choice{}, fmt.Errorf("no candidate has pairs from every other subject")
		}
		return Choice{best, fmt.Sprintf("inner leave-one-subject-out MAE %.2f %%", scores[best].MAEPct), scores[best].MAEPct}, nil
	}
}

// NestedLeaveOneSubjectOut runs the nested evaluation with the InnerLOSO
// chooser. It needs at least three subjects (two to choose by in each
// fold) across the candidates.
func NestedLeaveOneSubjectOut(cands []Candidate, model string) (*Nested, error) {
	return LeaveOneSubjectOutWith(cands, model, InnerLOSO(cands, model))
}

// LeaveOneSubjectOutWith is the outer loop over the subjects that have
// pairs in some candidate: for each in turn, choose asks for a candidate
// knowing only the other subjects, a curve is fitted on their pairs of that
// candidate and scored on the held-out subject's pairs of it beside the
// mean predictor. A subject with no pairs in any candidate is not seen at
// all; NestedOver takes the subjects explicitly and reports such a subject
// as withheld.
func LeaveOneSubjectOutWith(cands []Candidate, model string, choose Chooser) (*Nested, error) {
	var all []Pair
	for _, c := range cands {
		all = append(all, c.Pairs...)
	}
	return NestedOver(cands, subjects(all), model, choose)
}

// NestedOver is LeaveOneSubjectOutWith over the given subjects (at least
// three; say, every person recorded), whether or not a candidate gave them
// pairs: a subject without pairs under the candidate chosen for its fold is
// Withheld, not dropped. Every pair's subject must be among subs.
func NestedOver(cands []Candidate, subs []string, model string, choose Chooser) (*Nested, error) {
	if degree(model) == 0 {
		return nil, fmt.Errorf("model: %q, want %s or %s", model, Linear, Quadratic)
	}
	if len(cands) == 0 {
		return nil, fmt.Errorf("candidates: none")
	}
	out := &Nested{Model: model}
	for _, c := range cands {
		for i, p := range c.Pairs {
			if p.Subject == "" {
				return nil, fmt.Errorf("candidate %q: pairs[%d]: subject: empty, nested leave-one-subject-out needs a subject on every pair", c.Name, i)
			}
			if !slices.Contains(subs, p.Subject) {
				return nil, fmt.Errorf("candidate %q: pairs[%d]: subject: %q is not among the subjects %q", c.Name, i, p.Subject, subs)
			}
			if err := p.validate(); err != nil {
				return nil, fmt.Errorf("candidate %q: pairs[%d]: %w", c.Name, i, err)
			}
		}
		out.Candidates = append(out.Candidates, c.Name)
	}
	subs = slices.Clone(subs)
	slices.Sort(subs)
	subs = slices.Compact(subs)
	if len(subs) < 3 {
		return nil, fmt.Errorf("pairs: %d subjects, nested leave-one-subject-out needs >= 3", len(subs))
	}
	var pred, base, ref []float64
	var who []string
	for _, held := range subs {
		f, p, b, r, err := nestedFold(cands, subs, held, model, choose)
		if err != nil {
			return nil, err
		}
		if !f.Withheld {
			pred, base, ref = append(pred, p...), append(base, b...), append(ref, r...)
			for range r {
				who = append(who, held)
			}
		}
		out.Folds = append(out.Folds, f)
	}
	if len(ref) == 0 {
		return nil, fmt.Errorf("nested: no held-out subject had pairs under its chosen candidate")
	}
	var err error
	if out.Pooled, err = Score(pred, ref, who); err != nil {
		return nil, err
	}
	if out.Baseline, err = Score(base, ref, who); err != nil {
		return nil, err
	}
	return out, nil
}

// nestedFold is one outer fold of LeaveOneSubjectOutWith: choose picks a
// candidate on the other subjects, the model is fitted on that candidate's
// pairs of the other subjects and scored on those of held, against the
// training mean as baseline. It returns the fold with the held-out
// predictions p, baselines b and references r (none when the chosen
// candidate has no pairs of held: the fold is then Withheld).
func nestedFold(cands []Candidate, subs []string, held, model string, choose Chooser) (f NestedFold, p, b, r []float64, err error) {
	train := slices.DeleteFunc(slices.Clone(subs), func(s string) bool { return s == held })
	ch, err := choose(train)
	if err != nil {
		return f, nil, nil, nil, fmt.Errorf("leave out subject %q: %w", held, err)
	}
	best := ch.Index
	if best < 0 || best >= len(cands) {
		return f, nil, nil, nil, fmt.Errorf("leave out subject %q: chooser gave candidate %d of %d", held, best, len(cands))
	}
	f = NestedFold{Subject: held, Chosen: cands[best].Name, Why: ch.Why, InnerMAEPct: ch.InnerMAEPct}
	var tr []Pair
	for _, q := range cands[best].Pairs {
		if q.Subject != held {
			tr = append(tr, q)
		}
	}
	if f.Coefficients, err = FitCoefficients(tr, model); err != nil {
		return f, nil, nil, nil, fmt.Errorf("leave out subject %q: %w", held, err)
	}
	mean := 0.0
	for _, q := range tr {
		mean += q.ReferencePct
	}
	mean /= float64(len(tr))
	for _, q := range cands[best].Pairs {
		if q.Subject == held {
			p = append(p, math.Min(100, math.Max(0, polyval(f.Coefficients, q.Ratio))))
			b = append(b, mean)
			r = append(r, q.ReferencePct)
		}
	}
	if len(r) == 0 {
		f.Withheld = true
		return f, nil, nil, nil, nil
	}
	if f.Fit, err = Score(p, r, nil); err != nil {
		return f, nil, nil, nil, err
	}
	if f.Baseline, err = Score(b, r, nil); err != nil {
		return f, nil, nil, nil, err
	}
	f.Fit.Subjects, f.Baseline.Subjects = 1, 1
	return f, p, b, r, nil
}

// Improvement is the pooled MAE's reduction relative to the mean
// predictor, as a fraction (0.15 = 15 % lower).
func (n *Nested) Improvement() float64 { return 1 - n.Pooled.MAEPct/n.Baseline.MAEPct }
