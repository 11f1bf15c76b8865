package tune

import (
	"math"
	"slices"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/stats"
)

// Scoring a grid point's episodes against the reference events.

// scorer holds one worker's buffers for scoring grid points.
type scorer struct {
	eps    []span
	ivs    [4][][2]float64 // [0] any priority, [1..3] by priority
	durs   [4][]float64
	delays []float64
	sc     []*span
	tp     []bool
}

// score scores grid point pt over devs, whose episodes are res.spans[v][off+d].
func (s *scorer) score(res *Result, devs []devInfo, off, pt int, scored []bool, grace float64) Row {
	reviews := res.Grid.Reference.Reviews != nil
	var row Row
	var alarmS [4]float64
	for p := range s.durs {
		s.durs[p] = s.durs[p][:0]
	}
	s.delays = s.delays[:0]
	events := 0
	for d := range devs {
		di := &devs[d]
		s.eps = s.eps[:0]
		for _, v := range res.ptVar[pt] {
			s.eps = append(s.eps, res.spans[v][off+d]...)
		}
		s.collect(&row, di, scored, &alarmS)
		// Matching (package doc): events against the scored episodes.
		events += len(di.events)
		s.match(&row, di, grace)
		if reviews {
			scoreReviews(&row, di, s.sc, grace)
		}
	}
	s.summarize(&row, res, &alarmS, events, reviews)
	return row
}

// collect counts one device's episodes (s.eps) into row, their durations
// into s.durs and their time in alarm by priority into alarmS, and keeps
// the scored ones in s.sc.
func (s *scorer) collect(row *Row, di *devInfo, scored []bool, alarmS *[4]float64) {
	for p := range s.ivs {
		s.ivs[p] = s.ivs[p][:0]
	}
	s.sc = s.sc[:0]
	for i := range s.eps {
		ep := &s.eps[i]
		end := ep.end
		if end != end {
			end = di.last
		}
		row.Episodes++
		row.ByPriority[ep.prio].Episodes++
		s.durs[0] = append(s.durs[0], end-ep.ann)
		s.durs[ep.prio] = append(s.durs[ep.prio], end-ep.ann)
		s.ivs[0] = append(s.ivs[0], [2]float64{ep.ann, end})
		if ep.esc == ep.esc && ep.esc < end {
			s.ivs[ep.prio0] = append(s.ivs[ep.prio0], [2]float64{ep.ann, ep.esc})
			s.ivs[ep.prio] = append(s.ivs[ep.prio], [2]float64{ep.esc, end})
		} else {
			s.ivs[ep.prio] = append(s.ivs[ep.prio], [2]float64{ep.ann, end})
		}
		if scored[ep.cond] {
			s.sc = append(s.sc, ep)
		}
	}
	for p := range s.ivs {
		alarmS[p] += coveredTime(s.ivs[p], di.segs)
	}
}

// match matches one device's reference events against its scored episodes
// (s.sc): detected events with their delays, and true positives.
func (s *scorer) match(row *Row, di *devInfo, grace float64) {
	row.ScoredEpisodes += len(s.sc)
	if cap(s.tp) < len(s.sc) {
		s.tp = make([]bool, len(s.sc))
	}
	tp := s.tp[:len(s.sc)]
	clear(tp)
	for e := range di.events {
		ev := &di.events[e]
		first := math.Inf(1)
		for k, ep := range s.sc {
			if matches(ep, ev, grace) {
				tp[k] = true
				first = min(first, ep.ann)
			}
		}
		if !math.IsInf(first, 1) {
			row.EventsDetected++
			s.delays = append(s.delays, max(0, first-ev.Start))
		}
	}
	for _, b := range tp {
		if b {
			row.TruePositives++
		}
	}
}

// summarize turns the counts of all devices into row's rates, shares and
// medians.
func (s *scorer) summarize(row *Row, res *Result, alarmS *[4]float64, events int, reviews bool) {
	days := res.MonitoredS / 86400
	row.PerDeviceDay = ratio(float64(row.Episodes), days)
	row.PerParticipantDay = math.NaN()
	if res.Participants > 0 {
		row.PerParticipantDay = ratio(float64(row.Episodes), res.ParticipantS/86400)
	}
	row.TimeInAlarmPct = 100 * ratio(alarmS[0], res.MonitoredS)
	row.MedianEpisodeS = stats.Median(s.durs[0])
	for p := alarms.PriorityLow; p <= alarms.PriorityHigh; p++ {
		b := &row.ByPriority[p]
		b.PerDeviceDay = ratio(float64(b.Episodes), days)
		b.TimeInAlarmPct = 100 * ratio(alarmS[p], res.MonitoredS)
		b.MedianEpisodeS = stats.Median(s.durs[p])
	}
	row.Sensitivity = ratio(float64(row.EventsDetected), float64(events))
	row.PPV = ratio(float64(row.TruePositives), float64(row.ScoredEpisodes))
	if reviews {
		row.PPV = math.NaN() // unreviewed alarms may be real or not: the reviews do not say
	}
	row.MedianDelayS = stats.Median(s.delays)
	row.P90DelayS = stats.Quantile(0.9, s.delays)
}

func ratio(a, b float64) float64 {
	if b == 0 {
		return math.NaN()
	}
	return a / b
}

// coveredTime is the length of the union of ivs within segs (both sorted
// by start on return; ivs is sorted in place).
func coveredTime(ivs, segs [][2]float64) float64 {
	if len(ivs) == 0 {
		return 0
	}
	slices.SortFunc(ivs, func(a, b [2]float64) int {
		switch {
		case a[0] < b[0]:
			return -1
		case a[0] > b[0]:
			return 1
		}
		return 0
	})
	total := 0.0
	k := 0
	cur := ivs[0]
	flush := func(iv [2]float64) {
		for k < len(segs) && segs[k][1] <= iv[0] {
			k++
		}
		for j := k; j < len(segs) && segs[j][0] < iv[1]; j++ {
			lo, hi := max(iv[0], segs[j][0]), min(iv[1], segs[j][1])
			if hi > lo {
				total += hi - lo
			}
		}
	}
	for _, iv := range ivs[1:] {
		if iv[0] <= cur[1] {
			cur[1] = max(cur[1], iv[1])
			continue
		}
		flush(cur)
		cur = iv
	}
	flush(cur)
	return total
}

// markPareto marks the rows no other row dominates: fewer or equal alarms
// per device-day with higher or equal sensitivity, one of them strictly.
// Without events (NaN sensitivity), only the lowest burden is marked.
func markPareto(rows []Row) {
	sens := func(r *Row) float64 {
		if r.Sensitivity != r.Sensitivity {
			return 0
		}
		return r.Sensitivity
	}
	for i := range rows {
		a := &rows[i]
		if a.PerDeviceDay != a.PerDeviceDay {
			continue
		}
		dominated := false
		for j := range rows {
			b := &rows[j]
			if i == j || b.PerDeviceDay != b.PerDeviceDay {
				continue
			}
			if b.PerDeviceDay <= a.PerDeviceDay && sens(b) >= sens(a) &&
				(b.PerDeviceDay < a.PerDeviceDay || sens(b) > sens(a)) {
				dominated = true
				break
			}
		}
		a.Pareto = !dominated
	}
}
