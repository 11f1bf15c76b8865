package calibration

import (
	"encoding/json"
	"fmt"
	"io"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// WriteText writes the evaluation as a table: per held-out subject the
// candidate chosen without it and why, the curve's bias, SD, Arms and MAE
// on it beside the mean predictor's, then the pooled rows and how much
// lower the pooled MAE is than the mean predictor's. title names the
// chooser.
func (n *Nested) WriteText(w io.Writer, title string) error {
	var b strings.Builder
	fmt.Fprintf(&b, "%s (%s curve; each held-out subject's variant chosen on the other subjects alone)\n", title, n.Model)
	for _, f := range n.Folds {
		if f.Withheld {
			fmt.Fprintf(&b, "  %s: chose %s (%s): no pairs for this subject under it (withheld, not scored)\n", f.Subject, f.Chosen, f.Why)
			continue
		}
		fmt.Fprintf(&b, "  %s: chose %s (%s)\n", f.Subject, f.Chosen, f.Why)
	}
	const rowFmt = "%-24s %5s %7s %6s %7s %6s   %-18s"
	line := func(a ...any) { fmt.Fprintln(&b, strings.TrimRight(fmt.Sprintf(rowFmt, a...), " ")) }
	line("", "n", "bias %", "SD %", "Arms %", "MAE %", "mean predictor MAE / Arms %")
	row := func(name string, s, base Stats) {
		line(name, fmt.Sprint(s.N), f2(s.BiasPct), f2(s.SDPct), f2(s.ArmsPct), f2(s.MAEPct), f2(base.MAEPct)+" / "+f2(base.ArmsPct))
	}
	for _, f := range n.Folds {
		if !f.Withheld {
			row("  "+f.Subject, f.Fit, f.Baseline)
		}
	}
	row("  pooled", n.Pooled, n.Baseline)
	fmt.Fprintf(&b, "pooled MAE %.1f %% lower than the mean predictor's (negative: worse)\n", 100*n.Improvement())
	_, err := io.WriteString(w, b.String())
	return err
}

// JSON is the evaluation as a JSON-ready map (NaN as null).
func (n *Nested) JSON() map[string]any {
	var folds []map[string]any
	for _, f := range n.Folds {
		folds = append(folds, map[string]any{
			"subject": f.Subject, "chosen": f.Chosen, "why": f.Why, "inner_mae_pct": jsonFloat(f.InnerMAEPct),
			"coefficients": f.Coefficients, "withheld": f.Withheld,
			"fit": statsJSON(f.Fit), "baseline": statsJSON(f.Baseline),
		})
	}
	return map[string]any{
		"model": n.Model, "candidates": n.Candidates, "folds": folds,
		"pooled": statsJSON(n.Pooled), "baseline": statsJSON(n.Baseline),
		"improvement": jsonFloat(n.Improvement()),
	}
}

// WriteStudyJSON writes several evaluations (by chooser name) as one JSON
// object with the caution.
func WriteStudyJSON(w io.Writer, evals map[string]*Nested, extra map[string]any) error {
	out := map[string]any{caution.JSONKey: caution.Text}
	for k, v := range extra {
		out[k] = v
	}
	for k, n := range evals {
		out[k] = n.JSON()
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(out)
}
