package calibration

import (
	"fmt"
	"math"
)

// Result is a fitted curve with the evidence for it.
type Result struct {
	Curve *Curve
	Pairs []Pair
	// Predicted is the fitted curve's value at each pair's ratio (in-sample).
	Predicted []float64
	// Fit scores the curve on the pairs it was fitted to.
	Fit Stats
	// LOSO is the leave-one-subject-out score; nil when the pairs name
	// fewer than two subjects.
	LOSO *LOSO
}

// Calibrate fits a curve to the pairs, scores it in-sample and, when every
// pair has a subject and there are at least two, leave-one-subject-out.
// The curve's Stats field records the headline numbers.
func Calibrate(pairs []Pair, opts FitOptions) (*Result, error) {
	if len(pairs) == 0 {
		return nil, fmt.Errorf("pairs: none, want at least %d", degree(opts.Model)+1)
	}
	withSubject := 0
	for _, p := range pairs {
		if p.Subject != "" {
			withSubject++
		}
	}
	if withSubject > 0 && withSubject < len(pairs) {
		return nil, fmt.Errorf("pairs: subject: %d of %d pairs have none; give every pair a subject or none", len(pairs)-withSubject, len(pairs))
	}
	curve, err := Fit(pairs, opts)
	if err != nil {
		return nil, err
	}
	res := &Result{Curve: curve, Pairs: pairs, Predicted: make([]float64, len(pairs))}
	ref := make([]float64, len(pairs))
	subs := make([]string, len(pairs))
	for i, p := range pairs {
		res.Predicted[i] = math.Min(100, math.Max(0, polyval(curve.Coefficients, p.Ratio)))
		ref[i] = p.ReferencePct
		subs[i] = p.Subject
	}
	if res.Fit, err = Score(res.Predicted, ref, subs); err != nil {
		return nil, err
	}
	if len(subjects(pairs)) >= 2 {
		if res.LOSO, err = LeaveOneSubjectOut(pairs, opts.Model); err != nil {
			return nil, err
		}
	}
	curve.Stats = res.curveStats()
	return res, nil
}

// curveStats is what the curve file records about its own evidence.
func (r *Result) curveStats() map[string]any {
	round := func(v float64) float64 { return math.Round(v*1000) / 1000 }
	m := map[string]any{
		"pairs":             r.Fit.N,
		"subjects":          r.Fit.Subjects,
		"reference_min_pct": round(r.Fit.RefMinPct),
		"reference_max_pct": round(r.Fit.RefMaxPct),
		"arms_pct":          round(r.Fit.ArmsPct),
		"bias_pct":          round(r.Fit.BiasPct),
		"sd_pct":            round(r.Fit.SDPct),
		"loa_low_pct":       round(r.Fit.LoALow),
		"loa_high_pct":      round(r.Fit.LoAHigh),
	}
	if r.LOSO != nil {
		m["loso_arms_pct"] = round(r.LOSO.Pooled.ArmsPct)
		m["loso_mae_pct"] = round(r.LOSO.Pooled.MAEPct)
	}
	return m
}

// Warnings collects what weakens the evidence: sparse decades, a short
// reference range, a single subject, held-out ratios outside the fitted
// range.
func (r *Result) Warnings() []string {
	w := r.Fit.Warnings()
	switch n := len(subjects(r.Pairs)); {
	case n == 0:
		w = append(w, "no subject column: the fit is scored only on its own training pairs, which says little; add subject for leave-one-subject-out")
	case n == 1:
		w = append(w, "one subject: no leave-one-subject-out score; the in-sample score says little about other people")
	}
	if r.LOSO != nil {
		for _, s := range r.LOSO.Subjects {
			if s.OutsideRange > 0 {
				w = append(w, fmt.Sprintf("subject %s: %d of %d held-out ratios outside the other subjects' range (scored by extending the polynomial)", s.Subject, s.OutsideRange, s.Fit.N))
			}
		}
	}
	return w
}

// Equation renders the curve as "SpO2 = a - b R + c R^2" ("(R/R0)" for a
// curve on the anchored ratio).
func (c *Curve) Equation() string {
	s := fmt.Sprintf("SpO2 = %.4g", c.Coefficients[0])
	x := "R"
	if c.Anchored() {
		x = "(R/R0)"
	}
	for i, v := range c.Coefficients[1:] {
		sign := "+"
		if v < 0 {
			sign, v = "-", -v
		}
		term := x
		if i == 1 {
			term = x + "^2"
		}
		s += fmt.Sprintf(" %s %.4g %s", sign, v, term)
	}
	return s
}
