package tune

import (
	"encoding/csv"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"strconv"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// SummaryColumns returns the summary.csv header for a grid: profile, one
// column per swept key (named as in the grid file), then the metrics.
// The first metric columns are the CONTRACT ones.
func SummaryColumns(g *Grid) []string {
	cols := []string{"profile"}
	for _, s := range g.Sweep {
		cols = append(cols, s.Key)
	}
	cols = append(cols, "episodes", "episodes_per_device_day", "time_in_alarm_pct",
		"sensitivity", "ppv", "median_delay_s", "p90_delay_s", "median_episode_s",
		"scored_episodes", "true_positive_episodes", "events", "events_detected")
	for _, p := range []alarms.Priority{alarms.PriorityHigh, alarms.PriorityMedium, alarms.PriorityLow} {
		n := p.String()
		cols = append(cols, "episodes_"+n, "episodes_per_device_day_"+n, "time_in_alarm_"+n+"_pct", "median_episode_"+n+"_s")
	}
	cols = append(cols, "pareto")
	if g.Reference.Reviews != nil {
		cols = append(cols, reviewColumns...)
	}
	if len(g.Participants) > 0 {
		cols = append(cols, "episodes_per_participant_day")
	}
	return cols
}

// reviewColumns end summary.csv with reference reviews: the reviewed
// episodes of the scored conditions (positive, negative) and per profile
// the positives raised, negatives avoided and alarms nobody reviewed.
var reviewColumns = []string{"reviewed_positive", "positive_raised", "reviewed_negative", "negative_avoided", "unreviewed_alarms"}

// WriteSummaryCSV writes the caution comment line, the header and one row
// per grid point, in grid order. Figures
// that are undefined (no events, no episodes) are empty cells.
func WriteSummaryCSV(w io.Writer, res *Result) error {
	if err := caution.WriteComment(w); err != nil {
		return fmt.Errorf("write summary: %w", err)
	}
	cw := csv.NewWriter(w)
	if err := cw.Write(SummaryColumns(res.Grid)); err != nil {
		return fmt.Errorf("write summary: %w", err)
	}
	for i, r := range res.Rows {
		pt := res.Points[i]
		rec := append([]string{pt.Name}, pt.Values...)
		rec = append(rec, strconv.Itoa(r.Episodes), num(r.PerDeviceDay, 3), num(r.TimeInAlarmPct, 3),
			num(r.Sensitivity, 4), num(r.PPV, 4), num(r.MedianDelayS, 1), num(r.P90DelayS, 1), num(r.MedianEpisodeS, 1),
			strconv.Itoa(r.ScoredEpisodes), strconv.Itoa(r.TruePositives), strconv.Itoa(res.Events), strconv.Itoa(r.EventsDetected))
		for _, p := range []alarms.Priority{alarms.PriorityHigh, alarms.PriorityMedium, alarms.PriorityLow} {
			b := r.ByPriority[p]
			rec = append(rec, strconv.Itoa(b.Episodes), num(b.PerDeviceDay, 3), num(b.TimeInAlarmPct, 3), num(b.MedianEpisodeS, 1))
		}
		rec = append(rec, strconv.FormatBool(r.Pareto))
		if res.Grid.Reference.Reviews != nil {
			rec = append(rec, strconv.Itoa(res.ReviewedPositive), strconv.Itoa(r.EventsDetected),
				strconv.Itoa(res.ReviewedNegative), strconv.Itoa(r.NegativesAvoided), strconv.Itoa(r.UnreviewedAlarms))
		}
		if len(res.Grid.Participants) > 0 {
			rec = append(rec, num(r.PerParticipantDay, 3))
		}
		if err := cw.Write(rec); err != nil {
			return fmt.Errorf("write summary: %w", err)
		}
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("write summary: %w", err)
	}
	return nil
}

// num formats f with prec decimals, "" for NaN or ±Inf.
func num(f float64, prec int) string {
	if !finite(f) {
		return ""
	}
	return strconv.FormatFloat(f, 'f', prec, 64)
}
