package tune

import (
	"context"
	"fmt"
	"math"
	"slices"
	"sort"
	"sync/atomic"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// DefaultMaxGap is the longest interval between consecutive samples counted
// as monitored time, when Options sets none (team choice: a minute without
// any sample means the device was off or disconnected).
const DefaultMaxGap = 60 * time.Second

// Options set how Run sweeps.
type Options struct {
	// Workers is the number of goroutines; zero means runtime.GOMAXPROCS(0).
	Workers int
	// MaxGap is the longest interval between consecutive samples counted as
	// monitored time; zero means DefaultMaxGap.
	MaxGap time.Duration
	// Progress, when non-nil, is called with units of work done and the
	// total, a few times a second and once at the end; never concurrently.
	Progress func(done, total int)
	// TrendParticipants, when set, names the participant of each trend (in
	// trend order; ByParticipant returns it): the result then counts
	// participant-days beside device-days.
	TrendParticipants []string

	engineOnly bool // tests: every variant through the engine, no interval shortcut
}

// Result is the outcome of a sweep: one Row per grid point, in grid order.
type Result struct {
	Grid   *Grid
	Points []Point
	Rows   []Row
	// Devices is the number of trends swept; MonitoredS their monitored
	// time in seconds (see the package doc).
	Devices    int
	MonitoredS float64
	// With Options.TrendParticipants: how many participants, and their
	// monitored time in seconds (per participant the union of their
	// trends' monitored segments, so two devices worn at once count once).
	Participants int
	ParticipantS float64
	// FirstS and LastS are the earliest and latest sample times.
	FirstS, LastS float64
	// Events is the number of reference events within the data;
	// EventsOutside counts events of a file that fell outside it (another
	// device or time) and were not scored.
	Events, EventsOutside int
	// With reference reviews: the reviewed episodes of the scored
	// conditions within the data, by how their label counts (Events =
	// ReviewedPositive), and those outside the data (not scored).
	ReviewedPositive, ReviewedNegative, ReviewedOther, ReviewsOutside int
	// Scored names the conditions scored against the events.
	Scored []string
	// Variants is how many distinct condition variants the engine ran.
	Variants int
	// Samples is the number of samples in the trends.
	Samples int
	// MaxGapS is the longest sample interval counted as monitored, s.
	MaxGapS float64
	// Estimated is the re-estimated trends of a grid with averaging times
	// (RunEstimated); nil otherwise. Devices, MonitoredS, FirstS, LastS and
	// Samples then describe one averaging time's trends (they share their
	// sample times), and the rule's events come from ReferenceAveraging's.
	Estimated *Estimated
	// ReferenceAveraging is the averaging time (as written in the grid)
	// whose re-estimated trends defined the reference rule's events: the
	// shortest, which follows the physiology closest. "" without averaging
	// times or with an events file.
	ReferenceAveraging string

	spans [][][]span // [variant][device] episodes, kept for tests
	ptVar [][]int    // [point][condition] variant
}

// PriorityStats are a row's figures for one priority.
type PriorityStats struct {
	Episodes       int     // episodes whose highest priority was this one
	PerDeviceDay   float64 // Episodes per 24 h of monitored time
	TimeInAlarmPct float64 // % of monitored time with an alarm at this priority
	MedianEpisodeS float64 // median duration of those episodes (NaN if none)
}

// Row is the figures of one grid point.
type Row struct {
	Episodes     int     // announced episodes, all conditions (as replay counts them)
	PerDeviceDay float64 // episodes per 24 h of monitored time
	// PerParticipantDay is episodes per 24 h of participant-monitored time
	// (NaN without Options.TrendParticipants).
	PerParticipantDay float64
	TimeInAlarmPct    float64 // % of monitored time with any alarm
	MedianEpisodeS    float64 // median announced-to-end duration, s (NaN if no episode)
	// ByPriority is indexed by alarms.Priority (Low, Medium, High; index 0 unused).
	ByPriority [4]PriorityStats

	ScoredEpisodes int     // episodes of the scored conditions
	TruePositives  int     // scored episodes that meet an event
	EventsDetected int     // events detected by a scored episode
	Sensitivity    float64 // EventsDetected / events (NaN without events)
	PPV            float64 // TruePositives / ScoredEpisodes (NaN without scored episodes)
	MedianDelayS   float64 // median detection delay, s (NaN if nothing detected)
	P90DelayS      float64 // 90th percentile detection delay, s
	// With reference reviews (reviews.go): reviewed-negative episodes no
	// scored episode matches, and scored episodes that match no reviewed
	// episode. Reviewed-positive episodes raised are EventsDetected.
	NegativesAvoided int
	UnreviewedAlarms int
	Pareto           bool // no other row has fewer alarms per device-day and at least the sensitivity (or as few and more)
}

// span is one announced episode, compact.
type span struct {
	cond            int32 // condition index in the base profile
	prio0, prio     alarms.Priority
	onset, ann, esc float64 // esc NaN when not escalated
	end             float64 // NaN while still active at the end of the data
}

// devInfo is what scoring needs to know about one trend.
type devInfo struct {
	name        string
	first, last float64
	segs        [][2]float64 // monitored segments
	events      []Event
	// With reference reviews: the reviewed-negative episodes and every
	// reviewed episode of the scored conditions (events are the positives).
	negatives, reviewed []Event
}

// variant is one distinct condition setting, run as a one-condition profile.
type variant struct {
	cond    int
	profile *alarms.Profile
}

type condKey struct {
	c      alarms.Condition
	esc    alarms.Escalation
	hasEsc bool
}

// Run sweeps every grid point of g over trends (one per device, samples in
// time order) and scores it. It stops early with ctx's error. A grid with
// averaging times needs RunEstimated: trends cannot be re-estimated.
func Run(ctx context.Context, g *Grid, trends []alarms.Trend, opt Options) (*Result, error) {
	if g.HasAveraging() {
		return nil, fmt.Errorf("%s (line %d): needs raw captures to re-run the estimator over; recorded trends cannot be re-estimated",
			AveragingKey, g.Sweep[0].lines[0])
	}
	return run(ctx, g, [][]alarms.Trend{trends}, 0, opt)
}

// RunEstimated sweeps a grid with averaging times over est, the trends
// re-estimated at each of them (EstimateStore): each grid point runs over
// the trends of its averaging time. Reference events are found once, by
// the rule on the trends of the shortest averaging time (or taken from the
// events file), and score every point alike.
func RunEstimated(ctx context.Context, g *Grid, est *Estimated, opt Options) (*Result, error) {
	if !slices.Equal(g.AveragingS, est.AveragingS) {
		return nil, fmt.Errorf("tune: trends estimated at %v s, the grid's averaging times are %v s", est.AveragingS, g.AveragingS)
	}
	ref := 0
	for a, v := range g.AveragingS {
		if v < g.AveragingS[ref] {
			ref = a
		}
	}
	res, err := run(ctx, g, est.Trends, ref, opt)
	if err != nil {
		return nil, err
	}
	res.Estimated = est
	if g.Reference.Rule != nil {
		res.ReferenceAveraging = g.Sweep[0].Values[ref]
	}
	return res, nil
}

// run sweeps g over sets of trends, one set per averaging time (one set
// without): every set holds the same devices in the same order, and a grid
// point runs over the set of its averaging time. Reference events and the
// monitored time come from sets[ref].
func run(ctx context.Context, g *Grid, sets [][]alarms.Trend, ref int, opt Options) (*Result, error) {
	pts, err := g.Points()
	if err != nil {
		return nil, err
	}
	trends := sets[ref]
	nd := len(trends)
	if err := checkSets(sets, ref); err != nil {
		return nil, err
	}
	workers := workerCount(opt.Workers)
	maxGap := DefaultMaxGap.Seconds()
	if opt.MaxGap > 0 {
		maxGap = opt.MaxGap.Seconds()
	}
	res := &Result{Grid: g, Points: pts, Rows: make([]Row, len(pts)), Devices: len(trends),
		Scored: g.Reference.Conditions, MaxGapS: maxGap, FirstS: math.Inf(1), LastS: math.Inf(-1)}

	vars, ptVar := conditionVariants(g, pts)
	res.ptVar = ptVar
	res.Variants = len(vars)

	devs := deviceFacts(g, trends, maxGap, res)
	if len(opt.TrendParticipants) > 0 {
		if len(opt.TrendParticipants) != nd {
			return nil, fmt.Errorf("tune: %d trend participants for %d trends", len(opt.TrendParticipants), nd)
		}
		participantFacts(devs, opt.TrendParticipants, res)
	}
	scored := scoredConditions(g)

	// Every set's sample times are those of sets[ref] (the estimator's
	// seconds do not depend on the averaging time), so devs serves them all.
	flat := nd * len(sets)             // (set, device) pairs: set a's device d is a*nd+d
	total := len(vars)*flat + len(pts) // one unit per (variant, set, device) and per point
	var done atomic.Int64
	stopProgress := startProgress(opt.Progress, &done, total)
	defer stopProgress()

	// Phase 1: every variant's episodes over every (set, device). A
	// threshold condition's episodes follow from its presence intervals,
	// which depend only on its Threshold: found once per Threshold and
	// device, they give every variant sharing it (delays, escalations,
	// latching) without re-running the engine. Desaturation, and trends
	// whose times do not strictly increase, go through the engine.
	if err := runEpisodes(ctx, workers, sets, vars, opt.engineOnly, res, &done); err != nil {
		return nil, err
	}

	// Phase 2: score every grid point.
	scratch := make([]scorer, workers)
	err = parallel(ctx, workers, len(pts), func(w, i int) error {
		res.Rows[i] = scratch[w].score(res, devs, pts[i].set*nd, i, scored, g.Reference.Grace.Seconds())
		done.Add(1)
		return nil
	})
	if err != nil {
		return nil, err
	}
	markPareto(res.Rows)
	return res, nil
}

// runEpisodes is phase 1 of run: it fills res.spans with every variant's
// episodes over every (set, device) pair, counting units in done.
func runEpisodes(ctx context.Context, workers int, sets [][]alarms.Trend, vars []variant, engineOnly bool, res *Result, done *atomic.Int64) error {
	nd := len(sets[0])
	flat := nd * len(sets)
	res.spans = make([][][]span, len(vars))
	for v := range res.spans {
		res.spans[v] = make([][]span, flat)
	}
	rules, groups, engineVars := groupVariants(vars, engineOnly)
	jobs := planJobs(sets, nd, len(vars), groups, engineVars)
	runners := make([]runner, workers)
	for w := range runners {
		runners[w].slots = make([]*slot, len(vars))
	}
	return parallel(ctx, workers, len(jobs), func(w, j int) error {
		jb := jobs[j]
		samples := sets[jb.f/nd][jb.f%nd].Samples
		if jb.group != nil {
			runners[w].derive(rules, vars, jb.group, samples, res.spans, jb.f)
			done.Add(int64(len(jb.group)))
			return nil
		}
		if err := runners[w].run(vars, jb.vars, samples, res.spans, jb.f); err != nil {
			return err
		}
		done.Add(int64(len(jb.vars)))
		return nil
	})
}

// scoredConditions marks the conditions of g.Base the reference scores.
func scoredConditions(g *Grid) []bool {
	scored := make([]bool, len(g.Base.Conditions))
	for _, name := range g.Reference.Conditions {
		for c := range g.Base.Conditions {
			if g.Base.Conditions[c].ConditionName() == name {
				scored[c] = true
			}
		}
	}
	return scored
}

// groupVariants sorts the variants into those run through the engine and
// groups of threshold variants sharing a Threshold (in order of first
// appearance), whose episodes follow from one set of presence intervals.
// rules holds each threshold variant's rule.
func groupVariants(vars []variant, engineOnly bool) (rules []alarms.ThresholdRule, groups [][]int, engineVars []int) {
	rules = make([]alarms.ThresholdRule, len(vars))
	groupOf := map[alarms.Threshold]int{}
	for v := range vars {
		r, ok := alarms.NewThresholdRule(vars[v].profile.Conditions[0])
		if !ok || engineOnly {
			engineVars = append(engineVars, v)
			continue
		}
		rules[v] = r
		k, seen := groupOf[r.Threshold]
		if !seen {
			k = len(groups)
			groupOf[r.Threshold] = k
			groups = append(groups, nil)
		}
		groups[k] = append(groups[k], v)
	}
	return rules, groups, engineVars
}

// sweepJob is one unit of phase 1 of run: over (set, device) f, some
// variants run through the engine or one group derived from the presence
// intervals of their Threshold.
type sweepJob struct {
	f     int
	vars  []int // run through the engine
	group []int // derived from the presence intervals of their Threshold
}

// planJobs lists phase 1's jobs over every (set, device): a device whose
// sample times do not strictly increase runs every variant through the
// engine; engine variants go in blocks of variantBlock.
func planJobs(sets [][]alarms.Trend, nd, nvars int, groups [][]int, engineVars []int) []sweepJob {
	var jobs []sweepJob
	var allVars []int
	for v := range nvars {
		allVars = append(allVars, v)
	}
	for f := range nd * len(sets) {
		samples := sets[f/nd][f%nd].Samples
		ev := engineVars
		if !increasing(samples) {
			ev = allVars
		} else {
			for _, g := range groups {
				jobs = append(jobs, sweepJob{f: f, group: g})
			}
		}
		for lo := 0; lo < len(ev); lo += variantBlock {
			jobs = append(jobs, sweepJob{f: f, vars: ev[lo:min(len(ev), lo+variantBlock)]})
		}
	}
	return jobs
}

// checkSets makes sure every trend set has the devices of sets[ref], in
// the same order.
func checkSets(sets [][]alarms.Trend, ref int) error {
	trends := sets[ref]
	nd := len(trends)
	for a, set := range sets {
		if len(set) != nd {
			return fmt.Errorf("tune: trend set %d has %d devices, set %d has %d", a, len(set), ref, nd)
		}
		for d := range set {
			if set[d].Device != trends[d].Device {
				return fmt.Errorf("tune: trend set %d has device %q where set %d has %q", a, set[d].Device, ref, trends[d].Device)
			}
		}
	}
	return nil
}

// conditionVariants lists the distinct condition settings across the grid
// points (each run once, as a one-condition profile) and, per point and
// condition, which variant it uses.
func conditionVariants(g *Grid, pts []Point) (vars []variant, ptVar [][]int) {
	nc := len(g.Base.Conditions)
	index := make([]map[condKey]int, nc)
	ptVar = make([][]int, len(pts))
	for i, pt := range pts {
		ptVar[i] = make([]int, nc)
		for c := range nc {
			pc := pt.Profile.Conditions[c]
			k := condKey{c: pc}
			k.c.Escalate = nil
			if pc.Escalate != nil {
				k.esc, k.hasEsc = *pc.Escalate, true
			}
			if index[c] == nil {
				index[c] = map[condKey]int{}
			}
			v, ok := index[c][k]
			if !ok {
				one := &alarms.Profile{Name: g.Base.Name, PauseMax: g.Base.PauseMax,
					Conditions: []alarms.Condition{pt.Profile.Clone().Conditions[c]}}
				v = len(vars)
				vars = append(vars, variant{cond: c, profile: one})
				index[c][k] = v
			}
			ptVar[i][c] = v
		}
	}
	return vars, ptVar
}

// deviceFacts finds each device's monitored segments, last sample and
// reference events, and adds the totals (samples, monitored time, first and
// last sample, events) to res.
func deviceFacts(g *Grid, trends []alarms.Trend, maxGap float64, res *Result) []devInfo {
	nd := len(trends)
	devs := make([]devInfo, nd)
	byName := map[string]int{}
	for d, tr := range trends {
		byName[tr.Device] = d
		di := &devs[d]
		di.name = tr.Device
		res.Samples += len(tr.Samples)
		di.segs, di.last = segments(tr.Samples, maxGap)
		for _, s := range di.segs {
			res.MonitoredS += s[1] - s[0]
		}
		if n := len(tr.Samples); n > 0 {
			di.first = tr.Samples[0].T
			res.FirstS = min(res.FirstS, tr.Samples[0].T)
			res.LastS = max(res.LastS, tr.Samples[n-1].T)
		}
		if r := g.Reference.Rule; r != nil {
			di.events = RuleEvents(tr.Device, tr.Samples, *r)
			res.Events += len(di.events)
		}
	}
	if g.Reference.Reviews != nil {
		reviewFacts(g, devs, byName, res)
	} else if g.Reference.Rule == nil {
		for _, ev := range g.Reference.Events {
			d, ok := byName[ev.Device]
			if !ok || len(trends[d].Samples) == 0 || ev.End < trends[d].Samples[0].T || ev.Start > devs[d].last {
				res.EventsOutside++
				continue
			}
			devs[d].events = append(devs[d].events, ev)
			res.Events++
		}
		for d := range devs {
			sort.SliceStable(devs[d].events, func(i, j int) bool { return devs[d].events[i].Start < devs[d].events[j].Start })
		}
	}
	return devs
}

// variantBlock is how many condition variants one job evaluates together
// over a device's trend, and chunk how many samples each of them evaluates
// before the next takes over: the chunk (40 KiB) stays in the core's cache
// while every variant of the block reads it, instead of every variant
// streaming the whole trend from memory.
const (
	variantBlock = 32
	chunk        = 1024
)

// slot is one worker's engine for one variant.
type slot struct {
	e     *alarms.Engine
	cond  int32
	prio0 alarms.Priority
	out   []span
	emit  func(alarms.Event) // s.onEvent, bound once
	open  []alarms.Episode
}

func (s *slot) onEvent(ev alarms.Event) {
	if ev.Type == alarms.EventEnded {
		s.add(&ev.Episode)
	}
}

func (s *slot) add(ep *alarms.Episode) {
	s.out = append(s.out, span{cond: s.cond, prio0: s.prio0, prio: ep.Priority, onset: ep.OnsetS,
		ann: ep.AnnouncedS, esc: ep.EscalatedS, end: ep.EndedS})
}

// runner is one worker's engines, created on first use, and its buffer
// of presence intervals.
type runner struct {
	slots []*slot
	pres  []alarms.Presence
	spans []span // derive's buffer: one variant's episodes before they are copied out
}

// derive finds the presence intervals of the Threshold shared by the
// variants of group over one device's samples (strictly increasing times)
// and stores each variant's announced episodes in spans[v][d]: the same
// episodes, in the same order, as run gives (TestIntervalSweepAgrees).
func (r *runner) derive(rules []alarms.ThresholdRule, vars []variant, group []int, samples []alarms.Sample, spans [][][]span, d int) {
	r.pres, _ = rules[group[0]].Presences(samples, r.pres[:0])
	for _, v := range group {
		rule := &rules[v]
		cond, prio0 := int32(vars[v].cond), vars[v].profile.Conditions[0].Priority
		out := r.spans[:0]
		for _, p := range r.pres {
			ep, ok := rule.Episode(samples, p)
			if !ok {
				continue
			}
			out = append(out, span{cond: cond, prio0: prio0, prio: ep.Priority, onset: ep.Onset,
				ann: ep.Announced, esc: ep.Escalated, end: ep.Ended})
		}
		r.spans = out
		if len(out) > 0 {
			spans[v][d] = slices.Clone(out) // sized once, not grown
		}
	}
}

// increasing reports whether sample times strictly increase (the engine
// skips a sample that is not after the previous one).
func increasing(s []alarms.Sample) bool {
	prev := math.Inf(-1)
	for i := range s {
		if !(s[i].T > prev) {
			return false
		}
		prev = s[i].T
	}
	return true
}

// run evaluates variants lo..hi-1 over one device's samples, chunk by
// chunk, and stores their episodes in spans[v][d]. It reports the same
// episodes as alarms.Engine.Run (ended ones as they end, then those still
// active after the last sample); TestTuneAgreesWithReplay checks this
// against alarms.ReplayTrends.
func (r *runner) run(vars []variant, ids []int, samples []alarms.Sample, spans [][][]span, d int) error {
	for _, v := range ids {
		sl := r.slots[v]
		if sl == nil {
			e, err := alarms.NewEngine(vars[v].profile, "")
			if err != nil {
				return fmt.Errorf("condition %s: %w", vars[v].profile.Conditions[0].ConditionName(), err)
			}
			sl = &slot{e: e, cond: int32(vars[v].cond), prio0: vars[v].profile.Conditions[0].Priority}
			sl.emit = sl.onEvent
			r.slots[v] = sl
		}
		sl.e.Reset()
		sl.out = nil
	}
	for c0 := 0; c0 < len(samples); c0 += chunk {
		part := samples[c0:min(len(samples), c0+chunk)]
		for _, v := range ids {
			sl := r.slots[v]
			e, emit := sl.e, sl.emit
			for i := range part {
				e.Eval(part[i], emit)
			}
		}
	}
	for _, v := range ids {
		sl := r.slots[v]
		sl.open = sl.e.Episodes(sl.open[:0])
		for i := range sl.open {
			if sl.open[i].Phase == alarms.Active {
				sl.add(&sl.open[i])
			}
		}
		spans[v][d] = sl.out
	}
	return nil
}

// segments returns the monitored segments of a trend (gaps over maxGap
// split them) and the last sample time.
func segments(s []alarms.Sample, maxGap float64) ([][2]float64, float64) {
	if len(s) == 0 {
		return nil, math.NaN()
	}
	var segs [][2]float64
	start, prev := s[0].T, s[0].T
	for i := 1; i < len(s); i++ {
		t := s[i].T
		if t-prev > maxGap {
			if prev > start {
				segs = append(segs, [2]float64{start, prev})
			}
			start = t
		}
		prev = t
	}
	if prev > start {
		segs = append(segs, [2]float64{start, prev})
	}
	return segs, prev
}
