package calibration

import (
	"fmt"
	"io"
	"math"

	"github.com/pulsefleet/pulsefleet/internal/chart"
)

// WriteCurveSVG plots the pairs (reference SpO2 against R, one colour per
// subject) with the fitted curve over its valid range.
func (r *Result) WriteCurveSVG(w io.Writer) error {
	c := &figure{
		title:  fmt.Sprintf("Calibration %s (%s)", r.Curve.CurveName(), r.Curve.Model),
		xLabel: "ratio of ratios R (dimensionless)",
		yLabel: "SpO2 (%)",
	}
	c.xMin, c.xMax = r.Curve.RatioMin, r.Curve.RatioMax
	c.yMin, c.yMax = math.Inf(1), math.Inf(-1)
	c.series = r.subjectSeries(func(i int) point { return point{r.Pairs[i].Ratio, r.Pairs[i].ReferencePct} }, "reference")
	for _, s := range c.series {
		for _, p := range s.points {
			c.yMin, c.yMax = math.Min(c.yMin, p.y), math.Max(c.yMax, p.y)
		}
	}
	var line []point
	const steps = 100
	for k := 0; k <= steps; k++ {
		x := c.xMin + (c.xMax-c.xMin)*float64(k)/steps
		y, _ := r.Curve.SpO2(x)
		line = append(line, point{x, y})
		c.yMin, c.yMax = math.Min(c.yMin, y), math.Max(c.yMax, y)
	}
	c.series = append(c.series, series{name: "fitted curve", color: chart.Vermillion, points: line, line: true})
	c.subtitle = fmt.Sprintf("%s, valid for R in [%.4g, %.4g]", r.Curve.Equation(), r.Curve.RatioMin, r.Curve.RatioMax)
	c.notes = []string{fmt.Sprintf("n = %d, Arms = %.2f %%", r.Fit.N, r.Fit.ArmsPct), "(in sample)"}
	return c.write(w)
}

// subjectSeries makes one scatter series per subject (or one named
// fallback when there are no subjects).
func (r *Result) subjectSeries(at func(i int) point, fallback string) []series {
	subs := subjects(r.Pairs)
	if len(subs) == 0 {
		s := series{name: fallback, color: chart.Blue}
		for i := range r.Pairs {
			s.points = append(s.points, at(i))
		}
		return []series{s}
	}
	idx := map[string]int{}
	out := make([]series, len(subs))
	for k, sub := range subs {
		idx[sub] = k
		out[k] = series{name: sub, color: chart.Color(k)}
	}
	for i, p := range r.Pairs {
		k := idx[p.Subject]
		out[k].points = append(out[k].points, at(i))
	}
	return out
}

// WriteBlandAltmanSVG plots predicted - reference against their mean, with
// the bias and the limits of agreement (bias -/+ 1.96 SD). heldOut selects
// the leave-one-subject-out predictions (an error when there are none)
// instead of the in-sample ones.
func (r *Result) WriteBlandAltmanSVG(w io.Writer, heldOut bool) error {
	pred, st, what := r.Predicted, r.Fit, "in sample"
	if heldOut {
		if r.LOSO == nil {
			return fmt.Errorf("bland-altman: no leave-one-subject-out predictions (pairs name fewer than two subjects)")
		}
		pred, st, what = r.LOSO.Predicted, r.LOSO.Pooled, "leave-one-subject-out"
	}
	c := &figure{
		title:  fmt.Sprintf("Bland-Altman, %s (%s)", r.Curve.CurveName(), what),
		xLabel: "mean of predicted and reference SpO2 (%)",
		yLabel: "predicted - reference SpO2 (%)",
	}
	c.series = r.subjectSeries(func(i int) point {
		return point{(pred[i] + r.Pairs[i].ReferencePct) / 2, pred[i] - r.Pairs[i].ReferencePct}
	}, "pairs")
	c.xMin, c.xMax, c.yMin, c.yMax = math.Inf(1), math.Inf(-1), math.Min(st.LoALow, 0), math.Max(st.LoAHigh, 0)
	for _, s := range c.series {
		for _, p := range s.points {
			c.xMin, c.xMax = math.Min(c.xMin, p.x), math.Max(c.xMax, p.x)
			c.yMin, c.yMax = math.Min(c.yMin, p.y), math.Max(c.yMax, p.y)
		}
	}
	hline := func(name, color, dash string, y float64) series {
		return series{name: name, color: color, dash: dash, line: true, points: []point{{c.xMin - 1e3, y}, {c.xMax + 1e3, y}}}
	}
	c.series = append(c.series,
		hline(fmt.Sprintf("bias %.2f %%", st.BiasPct), "#333333", "", st.BiasPct),
		hline(fmt.Sprintf("bias + 1.96 SD = %.2f %%", st.LoAHigh), chart.Vermillion, "6 4", st.LoAHigh),
		hline(fmt.Sprintf("bias - 1.96 SD = %.2f %%", st.LoALow), chart.Vermillion, "6 4", st.LoALow),
	)
	c.subtitle = "limits of agreement: bias -/+ 1.96 SD (population SD of the differences)"
	c.notes = []string{fmt.Sprintf("n = %d, SD = %.2f %%", st.N, st.SDPct), fmt.Sprintf("Arms = %.2f %%", st.ArmsPct)}
	return c.write(w)
}
