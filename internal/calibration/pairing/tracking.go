package pairing

import (
	"fmt"
	"math"
	"slices"

	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// TrackingChooser chooses, among the variants with anchor length anchorS
// (0 = unanchored ones), the one whose per-second ratio tracks the
// reference best within the training recordings (mean over them of
// -Pearson r between the ratio at second k and the reference at k + lag),
// among those that give pairs from every training subject. Within one
// recording a person's offset cancels, and an anchor divides a recording's
// ratios by a constant, which leaves r unchanged: the choice rests on the
// signal each training person carries, not on how three people's offsets
// happen to line up. It never reads a subject outside train. Ties go to
// the earlier variant. (docs/calibration-protocol.md, version 1, the
// secondary evaluation.)
func (st *Study) TrackingChooser(anchorS int) calibration.Chooser {
	return func(train []string) (calibration.Choice, error) {
		best, bestTrack := -1, math.Inf(-1)
		for i, v := range st.Variants {
			if v.AnchorS != anchorS || !pairsFromAll(st.Candidates[i].Pairs, train) {
				continue
			}
			var sum float64
			var n int
			for _, s := range train {
				for _, c := range st.track[i][s] {
					sum += c
					n++
				}
			}
			if n == 0 {
				continue
			}
			if m := sum / float64(n); m > bestTrack {
				best, bestTrack = i, m
			}
		}
		if best < 0 {
			return calibration.Choice{}, fmt.Errorf("tracking: no variant with anchor %d s gives pairs from every training subject", anchorS)
		}
		return calibration.Choice{
			Index:       best,
			Why:         fmt.Sprintf("tracks the reference with r = %.2f within training recordings", bestTrack),
			InnerMAEPct: math.NaN(),
		}, nil
	}
}

// pairsFromAll reports whether pairs include at least one of every
// subject in subs.
func pairsFromAll(pairs []calibration.Pair, subs []string) bool {
	have := map[string]bool{}
	for _, p := range pairs {
		if slices.Contains(subs, p.Subject) {
			have[p.Subject] = true
		}
	}
	return len(have) == len(subs)
}

// Nested is the nested leave-one-subject-out evaluation over every
// recorded subject (calibration.NestedOver with calibration.InnerLOSO): a
// subject whose chosen variant gives it no pairs is withheld, not dropped.
func (st *Study) Nested(model string) (*calibration.Nested, error) {
	return calibration.NestedOver(st.Candidates, st.Subjects, model, calibration.InnerLOSO(st.Candidates, model))
}

// With is the leave-one-subject-out evaluation of a chooser over every
// recorded subject.
func (st *Study) With(model string, choose calibration.Chooser) (*calibration.Nested, error) {
	return calibration.NestedOver(st.Candidates, st.Subjects, model, choose)
}
