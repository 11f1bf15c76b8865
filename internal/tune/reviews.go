package tune

import (
	"fmt"
	"math"
	"slices"
	"strings"

	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/internal/review"
	"github.com/pulsefleet/pulsefleet/internal/store"
	"github.com/pulsefleet/pulsefleet/internal/yamlwalk"
)

// Tuning against the operators' reviews (reference: reviews: ...).
//
// A reviewed episode is an alarm episode the gateway raised and an operator
// labelled afterwards. Only episodes of the scored conditions count (the
// grid's reference.conditions, by default the base profile's spo2_low
// conditions, matched by condition name). Its span is onset to end (a still
// active episode: to the device's last sample).
//
// Matching a replayed alarm to a reviewed episode is the rule used for
// events (package doc): same device, and the replayed alarm's
// announced-to-end span overlaps the reviewed episode's onset-to-end span
// extended at its end by the grid's grace (default 60 s): announced at or
// before end + grace and not ended before onset. Per grid point:
//
//   - positive episodes raised: reviewed-positive episodes matched by at
//     least one replayed alarm (the sensitivity is this over the positives);
//   - negative episodes avoided: reviewed-negative episodes matched by no
//     replayed alarm;
//   - unreviewed alarms: replayed alarms that match no reviewed episode of
//     any label (unsure and labels in neither list included): nobody said
//     whether they were real, and the figures do not guess. PPV is left
//     undefined for the same reason.

// ReviewSets names the review labels that count as positive (a real event
// the profile should raise) and negative (an alarm it should avoid). Labels
// in neither (unsure by default) are reviewed but scored as neither.
type ReviewSets struct {
	Positive, Negative []string
}

func (r *ReviewSets) String() string {
	return fmt.Sprintf("positive: [%s], negative: [%s]", strings.Join(r.Positive, ", "), strings.Join(r.Negative, ", "))
}

// ReviewedEpisode is an alarm episode the gateway stored with its newest
// review; times in Unix seconds (End NaN while still active).
type ReviewedEpisode struct {
	ID         uint64
	Device     string
	Condition  string
	Start, End float64
	Label      string
}

func btoi(b bool) int {
	if b {
		return 1
	}
	return 0
}

func decodeReviewSets(n *yaml.Node, path string) (*ReviewSets, error) {
	rs := &ReviewSets{}
	seen := map[string]string{}
	var havePos bool
	err := yamlwalk.Mapping(n, path, func(key string, v *yaml.Node, path string) error {
		var dst *[]string
		switch key {
		case "positive":
			dst, havePos = &rs.Positive, true
		case "negative":
			dst = &rs.Negative
		default:
			return fmt.Errorf("%s (line %d): unknown key, want positive or negative", path, v.Line)
		}
		if v.Kind != yaml.SequenceNode {
			return fmt.Errorf("%s (line %d): want a list of review labels like [%s]", path, v.Line, review.Actionable)
		}
		for i, ln := range v.Content {
			if err := review.CheckLabel(fmt.Sprintf("%s[%d] (line %d)", path, i, ln.Line), ln.Value); err != nil {
				return err
			}
			if other, dup := seen[ln.Value]; dup {
				return fmt.Errorf("%s[%d] (line %d): %q is already in %s, want each label in one list", path, i, ln.Line, ln.Value, other)
			}
			seen[ln.Value] = key
			*dst = append(*dst, ln.Value)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	if !havePos || len(rs.Positive) == 0 {
		return nil, fmt.Errorf("%s (line %d): positive: want at least one label, like {positive: [actionable], negative: [not-actionable, artefact]}", path, n.Line)
	}
	return rs, nil
}

// LoadReviewed reads the reviewed episodes (with each newest review) from
// the store in dir, read-only, keeping those of f's devices whose span
// overlaps f's time range. A store held by a running gateway gives an error
// that says so; tune --gateway reads a snapshot instead.
func LoadReviewed(dir string, f Filter) ([]ReviewedEpisode, error) {
	db, err := openStore(dir)
	if err != nil {
		return nil, err
	}
	defer db.Close()
	rs, err := db.Reviews(store.ReviewFilter{})
	if err != nil {
		return nil, fmt.Errorf("store %s: reviews: %w", dir, err)
	}
	var out []ReviewedEpisode
	for _, r := range rs {
		e, err := db.Episode(r.EpisodeID)
		if err != nil {
			return nil, fmt.Errorf("store %s: episode %d of a review: %w", dir, r.EpisodeID, err)
		}
		re := ReviewedEpisode{ID: e.ID, Device: e.Device, Condition: e.Condition, Label: r.Label,
			Start: float64(e.OnsetMS) / 1000, End: math.NaN()}
		if e.EndedMS != 0 {
			re.End = float64(e.EndedMS) / 1000
		}
		if len(f.Devices) > 0 && !slices.Contains(f.Devices, re.Device) {
			continue
		}
		if (f.HasTo && re.Start >= f.To) || (f.HasFrom && re.End == re.End && re.End < f.From) {
			continue
		}
		out = append(out, re)
	}
	return out, nil
}

// reviewFacts files the reviewed episodes of the scored conditions under
// their devices: positives as events, negatives and every reviewed one for
// scoring; it counts them (and those outside the data) in res.
func reviewFacts(g *Grid, devs []devInfo, byName map[string]int, res *Result) {
	rs := g.Reference.Reviews
	for _, re := range g.Reference.Reviewed {
		if !slices.Contains(g.Reference.Conditions, re.Condition) {
			continue
		}
		d, ok := byName[re.Device]
		if !ok || re.Start > devs[d].last || (re.End == re.End && re.End < devs[d].first) {
			res.ReviewsOutside++
			continue
		}
		end := re.End
		if end != end {
			end = devs[d].last
		}
		ev := Event{Device: re.Device, Start: re.Start, End: end, Label: re.Label}
		di := &devs[d]
		di.reviewed = append(di.reviewed, ev)
		switch {
		case slices.Contains(rs.Positive, re.Label):
			di.events = append(di.events, ev)
			res.Events++
			res.ReviewedPositive++
		case slices.Contains(rs.Negative, re.Label):
			di.negatives = append(di.negatives, ev)
			res.ReviewedNegative++
		default:
			res.ReviewedOther++
		}
	}
}

// matches is the matching rule of replayed alarms and reference events or
// reviewed episodes (package doc): ep's announced-to-end span (end NaN =
// still active) overlaps [ev.Start, ev.End + grace].
func matches(ep *span, ev *Event, grace float64) bool {
	end := ep.end
	if end != end {
		end = math.Inf(1)
	}
	return ep.ann <= ev.End+grace && end >= ev.Start
}

// scoreReviews adds one device's review figures to row: negatives the
// scored episodes sc leave unmatched, and scored episodes matching no
// reviewed episode.
func scoreReviews(row *Row, di *devInfo, sc []*span, grace float64) {
	for i := range di.negatives {
		raised := false
		for _, ep := range sc {
			if matches(ep, &di.negatives[i], grace) {
				raised = true
				break
			}
		}
		if !raised {
			row.NegativesAvoided++
		}
	}
	for _, ep := range sc {
		reviewed := false
		for i := range di.reviewed {
			if matches(ep, &di.reviewed[i], grace) {
				reviewed = true
				break
			}
		}
		if !reviewed {
			row.UnreviewedAlarms++
		}
	}
}
