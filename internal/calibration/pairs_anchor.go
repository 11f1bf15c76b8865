package calibration

import (
	"bufio"
	"bytes"
	"fmt"
	"io"
	"strings"

	"github.com/pulsefleet/pulsefleet/estimator"
)

// Pairs of the anchored ratio. A pairs CSV whose ratios are R/R0 (each
// recording's ratio divided by its room-air anchor) names the column
// anchored_ratio instead of ratio and carries the anchor on a comment line
// before the header:
//
//	# anchor: anchor_s=60 anchor_min_sqi=0.5 anchor_min_seconds=10
//	anchored_ratio,reference_pct,subject
//
// so a curve fitted to them says what its input is (Curve.Input) and cannot
// be mistaken for a curve on R.
const anchorCommentPrefix = "# anchor:"

// ReadPairsAnchored reads a pairs CSV of either kind: it returns the
// anchor the ratios are divided by (LengthS 0 for raw R). A column
// anchored_ratio without the anchor line, or the line with a ratio column,
// is an error naming what is missing.
func ReadPairsAnchored(r io.Reader) ([]Pair, estimator.AnchorSpec, error) {
	data, err := io.ReadAll(r)
	if err != nil {
		return nil, estimator.AnchorSpec{}, fmt.Errorf("pairs: %w", err)
	}
	spec, found, err := anchorLine(data)
	if err != nil {
		return nil, spec, err
	}
	pairs, col, err := readPairs(bytes.NewReader(data))
	if err != nil {
		return nil, spec, err
	}
	switch {
	case col == "anchored_ratio" && !found:
		return nil, spec, fmt.Errorf("pairs: column anchored_ratio without a %q line saying which anchor divides the ratios", anchorCommentPrefix)
	case col == "ratio" && found:
		return nil, spec, fmt.Errorf("pairs: a %q line but the column is ratio (raw R); anchored pairs name it anchored_ratio", anchorCommentPrefix)
	}
	return pairs, spec, nil
}

// anchorLine finds and parses the "# anchor:" comment line.
func anchorLine(data []byte) (spec estimator.AnchorSpec, found bool, err error) {
	sc := bufio.NewScanner(bytes.NewReader(data))
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		if !strings.HasPrefix(line, "#") {
			if line != "" {
				break // the header: comments come before it
			}
			continue
		}
		rest, ok := strings.CutPrefix(line, anchorCommentPrefix)
		if !ok {
			continue
		}
		for _, f := range strings.Fields(rest) {
			k, v, _ := strings.Cut(f, "=")
			var n int
			switch k {
			case "anchor_s":
				_, err = fmt.Sscanf(v, "%d", &spec.LengthS)
			case "anchor_min_sqi":
				_, err = fmt.Sscanf(v, "%g", &spec.MinSQI)
			case "anchor_min_seconds":
				_, err = fmt.Sscanf(v, "%d", &n)
				spec.MinSeconds = n
			default:
				return spec, true, fmt.Errorf("pairs: %s %q: unknown key %q, want anchor_s, anchor_min_sqi, anchor_min_seconds", anchorCommentPrefix, rest, k)
			}
			if err != nil {
				return spec, true, fmt.Errorf("pairs: %s %s: %q is not a number", anchorCommentPrefix, k, v)
			}
		}
		if err := spec.Validate(); err != nil {
			return spec, true, fmt.Errorf("pairs: %s %w", anchorCommentPrefix, err)
		}
		return spec, true, nil
	}
	return estimator.AnchorSpec{}, false, nil
}

// WritePairsAnchored writes pairs whose ratios are R/R0 under spec (the
// format ReadPairsAnchored reads); spec.LengthS 0 writes plain pairs.
func WritePairsAnchored(w io.Writer, pairs []Pair, spec estimator.AnchorSpec) error {
	if spec.LengthS == 0 {
		return WritePairs(w, pairs)
	}
	if err := spec.Validate(); err != nil {
		return fmt.Errorf("write pairs: %w", err)
	}
	if _, err := fmt.Fprintf(w, "%s anchor_s=%d anchor_min_sqi=%g anchor_min_seconds=%d\n", anchorCommentPrefix, spec.LengthS, spec.MinSQI, spec.MinSeconds); err != nil {
		return fmt.Errorf("write pairs: %w", err)
	}
	return writePairs(w, pairs, "anchored_ratio")
}

// WithAnchor marks the curve as one on the anchored ratio under spec
// (LengthS 0 leaves it on R).
func (c *Curve) WithAnchor(spec estimator.AnchorSpec) {
	if spec.LengthS == 0 {
		return
	}
	c.Input, c.AnchorS, c.AnchorMinSQI, c.AnchorMinSec = InputAnchoredRatio, spec.LengthS, spec.MinSQI, spec.MinSeconds
}
