package calibration

import (
	"encoding/csv"
	"errors"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"math"
	"strconv"
	"strings"
)

// Pair is one calibration observation: what the prototype measured beside
// what the reference said at the same time.
type Pair struct {
	// Ratio is the prototype's ratio of ratios R (dimensionless), finite and
	// in (0, 10].
	Ratio float64
	// ReferencePct is the reference saturation (reference oximeter or blood
	// gas SaO2) in percent, 0..100.
	ReferencePct float64
	// Subject identifies the person (or session) the pair came from; empty
	// when unknown. Leave-one-subject-out scoring needs at least two.
	Subject string
	// Weight is the pair's weight in the least-squares fit, (0, 1]; 0 means
	// unweighted (1). Align sets it from the device's signal quality when
	// asked (AlignOptions.QualityWeights). Scores never weigh: every pair
	// counts once in Arms, bias and MAE.
	Weight float64
}

// weight is the pair's fitting weight: Weight, or 1 when unset.
func (p Pair) weight() float64 {
	if p.Weight == 0 {
		return 1
	}
	return p.Weight
}

// Bounds a pair must meet; they match what a Curve accepts.
const (
	maxRatio = 10.0
)

func (p Pair) validate() error {
	if math.IsNaN(p.Ratio) || math.IsInf(p.Ratio, 0) || p.Ratio <= 0 || p.Ratio > maxRatio {
		return fmt.Errorf("ratio: %v, want a finite number in (0, %v]", p.Ratio, maxRatio)
	}
	if math.IsNaN(p.ReferencePct) || p.ReferencePct < 0 || p.ReferencePct > 100 {
		return fmt.Errorf("reference_pct: %v, want 0..100", p.ReferencePct)
	}
	if !(p.Weight >= 0 && p.Weight <= 1) {
		return fmt.Errorf("weight: %v, want 0..1 (0 = unweighted)", p.Weight)
	}
	return nil
}

// ReadPairs reads the calibrate pairs CSV (CONTRACT): a header row naming
// the columns ratio and reference_pct, optionally subject and weight (an
// empty weight cell is unweighted); other columns are ignored. Every row must carry both numbers; an error names the line and the
// field. An input with no rows is an error.
//
// A file of anchored pairs (column anchored_ratio, ReadPairsAnchored) is
// refused: its ratios are R/R0, not R.
func ReadPairs(r io.Reader) ([]Pair, error) {
	p, col, err := readPairs(r)
	if err == nil && col != "ratio" {
		return nil, fmt.Errorf("pairs: column %s: these ratios are divided by a room-air anchor (R/R0), not R; read them as anchored pairs", col)
	}
	return p, err
}

// readPairs reads either kind of pairs file and says which ratio column it
// had (ratio or anchored_ratio).
func readPairs(r io.Reader) ([]Pair, string, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.TrimLeadingSpace = true
	cr.Comment = '#'
	header, err := cr.Read()
	if errors.Is(err, io.EOF) {
		return nil, "", errors.New("pairs: empty input, want a header row with ratio,reference_pct[,subject]")
	}
	if err != nil {
		return nil, "", fmt.Errorf("pairs: header: %w", err)
	}
	col := map[string]int{}
	for i, h := range header {
		col[strings.TrimSpace(strings.ToLower(strings.TrimPrefix(h, "\ufeff")))] = i
	}
	ri, ok1 := col["ratio"]
	ratioCol := "ratio"
	if ai, ok := col["anchored_ratio"]; ok {
		if ok1 {
			return nil, "", fmt.Errorf("pairs: header %q: both ratio and anchored_ratio, want one", strings.Join(header, ","))
		}
		ri, ok1, ratioCol = ai, true, "anchored_ratio"
	}
	pi, ok2 := col["reference_pct"]
	if !ok1 || !ok2 {
		return nil, "", fmt.Errorf("pairs: header %q: want columns ratio and reference_pct (and optionally subject; anchored pairs name the ratio column anchored_ratio)", strings.Join(header, ","))
	}
	si, hasSubject := col["subject"]
	wi, hasWeight := col["weight"]
	var pairs []Pair
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, "", fmt.Errorf("pairs: %w", err)
		}
		line, _ := cr.FieldPos(0)
		cell := func(i int) string {
			if i < len(rec) {
				return strings.TrimSpace(rec[i])
			}
			return ""
		}
		var p Pair
		if p.Ratio, err = parseCell(cell(ri)); err != nil {
			return nil, "", fmt.Errorf("pairs: line %d: %s: %w", line, ratioCol, err)
		}
		if p.ReferencePct, err = parseCell(cell(pi)); err != nil {
			return nil, "", fmt.Errorf("pairs: line %d: reference_pct: %w", line, err)
		}
		if hasSubject {
			p.Subject = cell(si)
		}
		if hasWeight && cell(wi) != "" {
			if p.Weight, err = parseCell(cell(wi)); err != nil {
				return nil, "", fmt.Errorf("pairs: line %d: weight: %w", line, err)
			}
		}
		if err := p.validate(); err != nil {
			return nil, "", fmt.Errorf("pairs: line %d: %w", line, err)
		}
		pairs = append(pairs, p)
	}
	if len(pairs) == 0 {
		return nil, "", errors.New("pairs: no rows after the header")
	}
	return pairs, ratioCol, nil
}

func parseCell(s string) (float64, error) {
	if s == "" {
		return 0, errors.New("empty cell, want a number")
	}
	v, err := strconv.ParseFloat(s, 64)
	if err != nil {
		return 0, fmt.Errorf("%q is not a number", s)
	}
	return v, nil
}

// WritePairs writes pairs in the format ReadPairs reads. The subject
// column is written when any pair has a subject, the weight column when any
// pair has a weight.
func WritePairs(w io.Writer, pairs []Pair) error { return writePairs(w, pairs, "ratio") }

func writePairs(w io.Writer, pairs []Pair, ratioCol string) error {
	withSubject, withWeight := false, false
	for _, p := range pairs {
		withSubject = withSubject || p.Subject != ""
		withWeight = withWeight || p.Weight != 0
	}
	if err := caution.WriteComment(w); err != nil {
		return fmt.Errorf("write pairs: %w", err)
	}
	cw := csv.NewWriter(w)
	header := []string{ratioCol, "reference_pct"}
	if withSubject {
		header = append(header, "subject")
	}
	if withWeight {
		header = append(header, "weight")
	}
	if err := cw.Write(header); err != nil {
		return fmt.Errorf("write pairs: %w", err)
	}
	for _, p := range pairs {
		rec := []string{strconv.FormatFloat(p.Ratio, 'g', -1, 64), strconv.FormatFloat(p.ReferencePct, 'g', -1, 64)}
		if withSubject {
			rec = append(rec, p.Subject)
		}
		if withWeight {
			rec = append(rec, strconv.FormatFloat(p.weight(), 'g', -1, 64))
		}
		if err := cw.Write(rec); err != nil {
			return fmt.Errorf("write pairs: %w", err)
		}
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("write pairs: %w", err)
	}
	return nil
}

// subjects returns the distinct non-empty subjects in order of first
// appearance.
func subjects(pairs []Pair) []string {
	seen := map[string]bool{}
	var out []string
	for _, p := range pairs {
		if p.Subject != "" && !seen[p.Subject] {
			seen[p.Subject] = true
			out = append(out, p.Subject)
		}
	}
	return out
}
