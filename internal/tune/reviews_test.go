package tune

import (
	"context"
	"math"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// reviewTrend is a hand-written record of device "bed-1" (1 Hz, invented):
// 97 % except six dips, t relative to t0 = 1,000,000 s:
//
//	A 100..109 at 85 (10 s)   B 200..259 at 85 (60 s)   C 300..307 at 86 (8 s)
//	D 400..449 at 84 (50 s)   E 500..511 at 87 (12 s)   F 550..569 at 85 (20 s)
func reviewTrend() []alarms.Trend {
	const t0 = 1_000_000.0
	dips := [][3]int{{100, 109, 85}, {200, 259, 85}, {300, 307, 86}, {400, 449, 84}, {500, 511, 87}, {550, 569, 85}}
	var s []alarms.Sample
	for t := 0; t < 600; t++ {
		v := 97.0
		for _, d := range dips {
			if t >= d[0] && t <= d[1] {
				v = float64(d[2])
			}
		}
		s = append(s, alarms.Sample{T: t0 + float64(t), SpO2: v, Pulse: 70, PI: 2, SQI: 0.9})
	}
	return []alarms.Trend{{Device: "bed-1", Samples: s}}
}

const reviewGrid = `
base:
  name: hand-reviews
  conditions:
    - {kind: spo2_low, limit: 90, hysteresis: 0, delay: 5s, priority: medium}
sweep:
  spo2_low.delay: [5s, 30s]
reference:
  reviews: {positive: [actionable], negative: [not-actionable, artefact]}
  grace: 10s
`

// reviewedByHand is what the gateway stored and the operators said. The
// gateway ran the 5 s delay, so each dip was an episode from its first low
// sample to the first 97 % sample: A [100, 110], B [200, 260], C [300, 308],
// D [400, 450], E [500, 512] (never reviewed), F [550, 570].
func reviewedByHand() []ReviewedEpisode {
	const t0 = 1_000_000.0
	ep := func(id uint64, dev, cond string, from, to float64, label string) ReviewedEpisode {
		return ReviewedEpisode{ID: id, Device: dev, Condition: cond, Start: t0 + from, End: t0 + to, Label: label}
	}
	return []ReviewedEpisode{
		ep(1, "bed-1", "spo2_low", 100, 110, "actionable"),
		ep(2, "bed-1", "spo2_low", 200, 260, "actionable"),
		ep(3, "bed-1", "spo2_low", 300, 308, "artefact"),
		ep(4, "bed-1", "spo2_low", 400, 450, "not-actionable"),
		ep(6, "bed-1", "spo2_low", 550, 570, "unsure"),
		ep(7, "bed-1", "desaturation", 200, 260, "actionable"), // not a scored condition: ignored
		ep(8, "bed-9", "spo2_low", 100, 110, "actionable"),     // a device not in the data: outside
	}
}

// TestTuneAgainstReviewsByHand scores both grid points against the reviews,
// counted by hand from the profile semantics (present below 90, clears at
// the first sample >= 90, announced once present for the delay) and the
// matching rule (an alarm matches a reviewed episode when announced at or
// before its end + 10 s grace and not ended before its onset):
//
// delay 5 s: alarms A (ann 105, ends 110), B (205-260), C (305-308),
// D (405-450), E (505-512), F (555-570): 6 scored episodes.
//   - positives raised: A and B -> 2 of 2, sensitivity 1;
//   - negatives avoided: C and D are both raised -> 0 of 2;
//   - unreviewed alarms: E matches no reviewed episode (D ends at 450,
//   - 10 s = 460 < 505) -> 1; F matches the unsure review: reviewed.
//
// delay 30 s: only B (announced 230, ends 260) and D (430-450) last 30 s;
// A (10 s), C (8 s), E (12 s), F (20 s) clear first: 2 scored episodes.
//   - positives raised: B -> 1 of 2, sensitivity 0.5;
//   - negatives avoided: C -> 1 of 2 (D still raised);
//   - unreviewed alarms: 0.
//
// Totals: 2 positive, 2 negative, 1 other (unsure) reviewed episodes of
// spo2_low in the data; bed-9's is outside; the desaturation one is not
// counted at all. PPV is undefined (NaN) with reviews.
func TestTuneAgainstReviewsByHand(t *testing.T) {
	g, err := ParseGrid([]byte(reviewGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	g.Reference.Reviewed = reviewedByHand()
	res, err := Run(context.Background(), g, reviewTrend(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if res.ReviewedPositive != 2 || res.ReviewedNegative != 2 || res.ReviewedOther != 1 || res.ReviewsOutside != 1 || res.Events != 2 {
		t.Errorf("reviewed positive %d, negative %d, other %d, outside %d, events %d; want 2, 2, 1, 1, 2 (worked above)",
			res.ReviewedPositive, res.ReviewedNegative, res.ReviewedOther, res.ReviewsOutside, res.Events)
	}
	want := []struct {
		delay                                 string
		episodes, raised, avoided, unreviewed int
		sens                                  float64
	}{
		{"5s", 6, 2, 0, 1, 1},
		{"30s", 2, 1, 1, 0, 0.5},
	}
	for i, w := range want {
		r := res.Rows[i]
		if got := strings.Join(res.Points[i].Values, ","); got != w.delay {
			t.Fatalf("point %d is %s, want %s", i, got, w.delay)
		}
		if r.ScoredEpisodes != w.episodes || r.EventsDetected != w.raised || r.NegativesAvoided != w.avoided ||
			r.UnreviewedAlarms != w.unreviewed || r.Sensitivity != w.sens || !math.IsNaN(r.PPV) {
			t.Errorf("delay %s: episodes %d, positives raised %d, negatives avoided %d, unreviewed %d, sensitivity %v, ppv %v; "+
				"want %d, %d, %d, %d, %v, NaN (worked above)", w.delay, r.ScoredEpisodes, r.EventsDetected, r.NegativesAvoided,
				r.UnreviewedAlarms, r.Sensitivity, r.PPV, w.episodes, w.raised, w.avoided, w.unreviewed, w.sens)
		}
	}
}

// The grid's reviews key: labels checked, each in one list, positive needed,
// and not together with a rule or a file.
func TestReviewsReferenceIsChecked(t *testing.T) {
	base := "base:\n  name: x\n  conditions:\n    - {kind: spo2_low, limit: 90, delay: 5s, priority: medium}\nsweep:\n  spo2_low.delay: [5s]\nreference:\n"
	for ref, want := range map[string]string{
		"  reviews: {positive: [real]}\n":                                      `reference.reviews.positive[0] (line 8): "real", want one of actionable, not-actionable, artefact, unsure`,
		"  reviews: {positive: [actionable], negative: [actionable]}\n":        `"actionable" is already in positive`,
		"  reviews: {negative: [artefact]}\n":                                  "positive: want at least one label",
		"  reviews: {positive: [actionable]}\n  rule: {below: 85, for: 10s}\n": "more than one of rule, file and reviews",
		"  reviews: {positive: actionable}\n":                                  "want a list of review labels",
	} {
		_, err := ParseGrid([]byte(base+ref), ".")
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("reference %q: %v, want an error containing %q", ref, err, want)
		}
	}
	g, err := ParseGrid([]byte(base+"  reviews: {positive: [actionable, unsure]}\n"), ".")
	if err != nil || len(g.Reference.Reviews.Positive) != 2 || len(g.Reference.Reviews.Negative) != 0 {
		t.Errorf("positive only: %v, %+v", err, g)
	}
}

// LoadReviewed reads a store's reviewed episodes with their newest review,
// filtered by device and time.
func TestLoadReviewedFromAStore(t *testing.T) {
	dir := t.TempDir()
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	e1 := &store.Episode{Device: "bed-1", Condition: "spo2_low", OnsetMS: 1_000_100_000, EndedMS: 1_000_110_000}
	e2 := &store.Episode{Device: "bed-2", Condition: "spo2_low", OnsetMS: 1_000_200_000, Active: true}
	e3 := &store.Episode{Device: "bed-1", Condition: "spo2_low", OnsetMS: 1_000_300_000, EndedMS: 1_000_308_000} // not reviewed
	if err := db.Write(&store.Batch{Episodes: []*store.Episode{e1, e2, e3}}); err != nil {
		t.Fatal(err)
	}
	for _, r := range []store.Review{{EpisodeID: e1.ID, Label: "artefact", Reviewer: "a"}, {EpisodeID: e1.ID, Label: "actionable", Reviewer: "b"},
		{EpisodeID: e2.ID, Label: "unsure", Reviewer: "a"}} {
		if _, err := db.PutReview(r, nil); err != nil {
			t.Fatal(err)
		}
	}
	db.Close()
	all, err := LoadReviewed(dir, Filter{})
	if err != nil {
		t.Fatal(err)
	}
	if len(all) != 2 || all[0].Label != "actionable" || all[0].Start != 1_000_100 || all[0].End != 1_000_110 || !math.IsNaN(all[1].End) {
		t.Errorf("reviewed %+v, want e1 actionable [1000100, 1000110] and e2 still active (End NaN)", all)
	}
	some, _ := LoadReviewed(dir, Filter{Devices: []string{"bed-2"}})
	late, _ := LoadReviewed(dir, Filter{From: 1_000_150, HasFrom: true})
	if len(some) != 1 || some[0].Device != "bed-2" || len(late) != 1 || late[0].Device != "bed-2" {
		t.Errorf("device filter %+v, time filter %+v; want bed-2's episode in both", some, late)
	}
}
