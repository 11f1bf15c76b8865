package calibration

import (
	"encoding/json"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"math"
	"strings"
)

// WriteText writes a readable stats table.
func (r *Result) WriteText(w io.Writer) error {
	c := r.Curve
	var b strings.Builder
	fmt.Fprintf(&b, "calibration %s (%s): %s, valid for R in [%.4g, %.4g]\n", c.CurveName(), c.Model, c.Equation(), c.RatioMin, c.RatioMax)
	fmt.Fprintf(&b, "pairs: %d from %d subjects; reference %.1f-%.1f %%\n\n", r.Fit.N, r.Fit.Subjects, r.Fit.RefMinPct, r.Fit.RefMaxPct)
	const rowFmt = "%-24s %5s %7s %6s %7s %6s %11s %11s"
	line := func(a ...any) { fmt.Fprintln(&b, strings.TrimRight(fmt.Sprintf(rowFmt, a...), " ")) }
	line("", "n", "bias %", "SD %", "Arms %", "MAE %", "LoA low %", "LoA high %")
	row := func(name string, s Stats) {
		line(name, fmt.Sprint(s.N), f2(s.BiasPct), f2(s.SDPct), f2(s.ArmsPct), f2(s.MAEPct), f2(s.LoALow), f2(s.LoAHigh))
	}
	decades := func(s Stats) {
		for _, d := range s.Decades {
			line(fmt.Sprintf("    %.0f-%.0f %%", d.LowPct, d.HighPct), fmt.Sprint(d.N), f2(d.BiasPct), f2(d.SDPct), f2(d.ArmsPct), "", "", "")
		}
		line("    70-100 %", fmt.Sprint(s.N70to100), "", "", f2(s.Arms70to100Pct), "", "", "")
	}
	row("fit (in sample)", r.Fit)
	decades(r.Fit)
	if l := r.LOSO; l != nil {
		fmt.Fprintln(&b, "leave-one-subject-out")
		for _, s := range l.Subjects {
			row("  "+s.Subject, s.Fit)
		}
		row("  pooled", l.Pooled)
		decades(l.Pooled)
		row("  mean predictor", l.Baseline)
		for _, sc := range l.Subjects {
			row("    "+sc.Subject, sc.Baseline)
		}
		fmt.Fprintf(&b, "pooled MAE %.1f %% lower than the mean predictor's (negative: worse)\n", 100*(1-l.Pooled.MAEPct/l.Baseline.MAEPct))
	}
	fmt.Fprintln(&b, "\nbias = mean(predicted - reference); SD = population SD; Arms^2 = bias^2 + SD^2; LoA = bias -/+ 1.96 SD.")
	if ws := r.Warnings(); len(ws) > 0 {
		fmt.Fprintln(&b, "\nwarnings:")
		for _, x := range ws {
			fmt.Fprintf(&b, "  - %s\n", x)
		}
	}
	fmt.Fprintf(&b, "\n%s\n", caution.Line)
	_, err := io.WriteString(w, b.String())
	return err
}

func f2(v float64) string {
	if math.IsNaN(v) {
		return "-"
	}
	s := fmt.Sprintf("%.2f", v)
	if s == "-0.00" {
		return "0.00"
	}
	return s
}

// jsonStats replaces NaN (empty decades) by null, which JSON can carry.
type jsonFloat float64

func (f jsonFloat) MarshalJSON() ([]byte, error) {
	if math.IsNaN(float64(f)) || math.IsInf(float64(f), 0) {
		return []byte("null"), nil
	}
	return json.Marshal(math.Round(float64(f)*1e6) / 1e6)
}

// WriteJSON writes the curve, the stats and the warnings as one JSON object.
func (r *Result) WriteJSON(w io.Writer) error {
	out := map[string]any{
		"curve":    r.Curve,
		"fit":      statsJSON(r.Fit),
		"warnings": nonNil(r.Warnings()),

		caution.JSONKey: caution.Text,
	}
	if r.LOSO != nil {
		var subs []map[string]any
		for _, s := range r.LOSO.Subjects {
			subs = append(subs, map[string]any{
				"subject": s.Subject, "fit": statsJSON(s.Fit), "baseline": statsJSON(s.Baseline), "outside_range": s.OutsideRange,
			})
		}
		out["loso"] = map[string]any{
			"model": r.LOSO.Model, "subjects": subs,
			"pooled": statsJSON(r.LOSO.Pooled), "baseline": statsJSON(r.LOSO.Baseline),
		}
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(out)
}

func nonNil(s []string) []string {
	if s == nil {
		return []string{}
	}
	return s
}

func statsJSON(s Stats) map[string]any {
	var decs []map[string]any
	for _, d := range s.Decades {
		decs = append(decs, map[string]any{
			"low_pct": d.LowPct, "high_pct": d.HighPct, "n": d.N,
			"bias_pct": jsonFloat(d.BiasPct), "sd_pct": jsonFloat(d.SDPct), "arms_pct": jsonFloat(d.ArmsPct),
		})
	}
	return map[string]any{
		"n": s.N, "subjects": s.Subjects,
		"bias_pct": jsonFloat(s.BiasPct), "sd_pct": jsonFloat(s.SDPct), "arms_pct": jsonFloat(s.ArmsPct),
		"mae_pct": jsonFloat(s.MAEPct), "loa_low_pct": jsonFloat(s.LoALow), "loa_high_pct": jsonFloat(s.LoAHigh),
		"n_70_100": s.N70to100, "arms_70_100_pct": jsonFloat(s.Arms70to100Pct),
		"reference_min_pct": jsonFloat(s.RefMinPct), "reference_max_pct": jsonFloat(s.RefMaxPct),
		"decades": decs,
	}
}
