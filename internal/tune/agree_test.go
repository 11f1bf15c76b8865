package tune

import (
	"cmp"
	"context"
	"math"
	"slices"
	"testing"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// A multi-condition base (the built-in ward profile: spo2_low with
// escalation and latching, pulse limits, desaturation, technical
// conditions) swept on several keys of two conditions.
const agreeGrid = `
base: adult-ward-pilot
sweep:
  spo2_low.limit: [86, 88, 90, 92]
  spo2_low.delay: [0s, 15s, 30s]
  spo2_low.escalate.below: [80, 84]
  desaturation.limit: [3, 4]
reference:
  rule: {below: 85, for: 60s}
`

type epKey struct {
	dev                  string
	cond                 string
	prio                 alarms.Priority
	onset, ann, esc, end float64
}

func sortKeys(k []epKey) {
	slices.SortFunc(k, func(a, b epKey) int {
		return cmp.Or(cmp.Compare(a.dev, b.dev), cmp.Compare(a.cond, b.cond), cmp.Compare(a.onset, b.onset), cmp.Compare(a.ann, b.ann))
	})
}

func nanZero(f float64) float64 {
	if math.IsNaN(f) {
		return -1
	}
	return f
}

// TestTuneAgreesWithReplay checks, grid point by grid point, that the
// episodes tune assembles from its condition variants are exactly those of
// alarms.ReplayTrends on the point's full profile (what `pulsefleet replay`
// prints), and that the summary's episode count equals the replay count.
func TestTuneAgreesWithReplay(t *testing.T) {
	hours := 2.0
	if testing.Short() {
		hours = 0.5
	}
	trends := cohort(cohortOptions{Devices: 6, Hours: hours, Seed: 11, DipsPerHour: 6, MissingPct: 1})
	g, err := ParseGrid([]byte(agreeGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	res, err := Run(context.Background(), g, trends, Options{Workers: 3})
	if err != nil {
		t.Fatal(err)
	}
	if res.Variants >= len(res.Points)*len(g.Base.Conditions) {
		t.Errorf("variants %d: the sweep did not share unchanged conditions", res.Variants)
	}
	total := 0
	for i, pt := range res.Points {
		eps, err := alarms.ReplayTrends(pt.Profile, trends)
		if err != nil {
			t.Fatal(err)
		}
		if res.Rows[i].Episodes != len(eps) {
			t.Errorf("%s: tune counts %d episodes, replay %d", pt.Name, res.Rows[i].Episodes, len(eps))
		}
		var want, got []epKey
		for _, e := range eps {
			want = append(want, epKey{e.Device, e.Condition, e.Priority, e.OnsetS, e.AnnouncedS, nanZero(e.EscalatedS), nanZero(e.EndedS)})
		}
		for c, v := range res.ptVar[i] {
			for d, spans := range res.spans[v] {
				for _, s := range spans {
					got = append(got, epKey{trends[d].Device, g.Base.Conditions[c].ConditionName(), s.prio, s.onset, s.ann, nanZero(s.esc), nanZero(s.end)})
				}
			}
		}
		sortKeys(want)
		sortKeys(got)
		if !slices.Equal(want, got) {
			t.Errorf("%s: episodes differ from replay (%d vs %d)", pt.Name, len(got), len(want))
		}
		total += len(eps)
	}
	if total == 0 {
		t.Fatal("no episodes at all: the cohort does not exercise the engine")
	}
	t.Logf("%d grid points, %d variants run, %d episodes compared", len(res.Points), res.Variants, total)
}

// TestWorkersDeterministic: the rows do not depend on the number of workers.
func TestWorkersDeterministic(t *testing.T) {
	trends := cohort(cohortOptions{Devices: 5, Hours: 0.5, Seed: 3, DipsPerHour: 10, MissingPct: 1})
	g, err := ParseGrid([]byte(agreeGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	var rows [][]Row
	for _, w := range []int{1, 2, 7} {
		res, err := Run(context.Background(), g, trends, Options{Workers: w})
		if err != nil {
			t.Fatal(err)
		}
		rows = append(rows, res.Rows)
	}
	for k := 1; k < len(rows); k++ {
		for i := range rows[0] {
			a, b := rows[0][i], rows[k][i]
			if a.Episodes != b.Episodes || !sameF(a.Sensitivity, b.Sensitivity) || !sameF(a.TimeInAlarmPct, b.TimeInAlarmPct) ||
				!sameF(a.MedianDelayS, b.MedianDelayS) || a.Pareto != b.Pareto {
				t.Fatalf("row %d differs between worker counts: %+v vs %+v", i, a, b)
			}
		}
	}
}

func sameF(a, b float64) bool { return a == b || (math.IsNaN(a) && math.IsNaN(b)) }
