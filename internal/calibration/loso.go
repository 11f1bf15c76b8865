package calibration

import (
	"fmt"
	"math"
)

// SubjectScore is the leave-one-subject-out score of one held-out subject.
type SubjectScore struct {
	Subject string
	// Fit scores the curve fitted to the other subjects on this subject.
	Fit Stats
	// Baseline scores predicting the mean reference of the other subjects
	// for every pair: a calibration worth having beats it.
	Baseline Stats
	// OutsideRange counts this subject's pairs whose ratio lies outside the
	// range of the other subjects' ratios. They are scored with the
	// polynomial extended (and clamped to 0..100 %), although a curve in the
	// field withholds them.
	OutsideRange int
}

// LOSO is a leave-one-subject-out evaluation: each subject in turn is held
// out, the model is fitted on the others and scored on it.
type LOSO struct {
	Model    string
	Subjects []SubjectScore
	// Pooled scores all held-out predictions together.
	Pooled Stats
	// Baseline pools the mean-predictor baseline the same way.
	Baseline Stats
	// Predicted holds the held-out prediction for each input pair, in input
	// order.
	Predicted []float64
}

// LeaveOneSubjectOut scores the model by leave-one-subject-out. Every pair
// needs a subject and there must be at least two subjects.
func LeaveOneSubjectOut(pairs []Pair, model string) (*LOSO, error) {
	if degree(model) == 0 {
		return nil, fmt.Errorf("model: %q, want %s or %s", model, Linear, Quadratic)
	}
	for i, p := range pairs {
		if p.Subject == "" {
			return nil, fmt.Errorf("pairs[%d]: subject: empty, leave-one-subject-out needs a subject on every pair", i)
		}
	}
	subs := subjects(pairs)
	if len(subs) < 2 {
		return nil, fmt.Errorf("pairs: %d subjects, leave-one-subject-out needs >= 2", len(subs))
	}
	out := &LOSO{Model: model, Predicted: make([]float64, len(pairs))}
	baseAll := make([]float64, len(pairs))
	refAll := make([]float64, len(pairs))
	subAll := make([]string, len(pairs))
	for _, held := range subs {
		var train []Pair
		var idx []int
		for i, p := range pairs {
			if p.Subject == held {
				idx = append(idx, i)
			} else {
				train = append(train, p)
			}
		}
		c, err := FitCoefficients(train, model)
		if err != nil {
			return nil, fmt.Errorf("leave out subject %q: %w", held, err)
		}
		lo, hi := ratioRange(train)
		mean := 0.0
		for _, p := range train {
			mean += p.ReferencePct
		}
		mean /= float64(len(train))
		sc := SubjectScore{Subject: held}
		pred := make([]float64, len(idx))
		base := make([]float64, len(idx))
		ref := make([]float64, len(idx))
		for j, i := range idx {
			p := pairs[i]
			if p.Ratio < lo || p.Ratio > hi {
				sc.OutsideRange++
			}
			pred[j] = math.Min(100, math.Max(0, polyval(c, p.Ratio)))
			base[j] = mean
			ref[j] = p.ReferencePct
			out.Predicted[i], baseAll[i], refAll[i], subAll[i] = pred[j], mean, p.ReferencePct, held
		}
		if sc.Fit, err = Score(pred, ref, nil); err != nil {
			return nil, fmt.Errorf("subject %q: %w", held, err)
		}
		if sc.Baseline, err = Score(base, ref, nil); err != nil {
			return nil, fmt.Errorf("subject %q: %w", held, err)
		}
		sc.Fit.Subjects, sc.Baseline.Subjects = 1, 1
		out.Subjects = append(out.Subjects, sc)
	}
	var err error
	if out.Pooled, err = Score(out.Predicted, refAll, subAll); err != nil {
		return nil, err
	}
	if out.Baseline, err = Score(baseAll, refAll, subAll); err != nil {
		return nil, err
	}
	return out, nil
}
