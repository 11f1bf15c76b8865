package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/progress"
	"github.com/pulsefleet/pulsefleet/internal/store"
	"github.com/pulsefleet/pulsefleet/internal/tune"
)

const tuneSummary = `Sweep a grid of alarm profiles over recorded history and score each one.

The grid file (--grid) names a base profile, the swept keys and the reference:

  base: adult-ward-pilot.yaml      # profile file (relative to the grid file), built-in name, or inline
  sweep:                           # CONDITION.KEY -> values; the grid is their cross product
    spo2_low.limit: [86, 88, 90]
    spo2_low.delay: [0s, 10s, 15s, 30s]
    spo2_low.hysteresis: [0, 1, 2]
    spo2_low.escalate.below: [80, 85]
  reference:                       # what counts as a real event
    rule: {below: 85, for: 60s}    # or: file: events.csv (device,start_s,end_s,label)
                                   # or: reviews: {positive: [actionable], negative: [not-actionable, artefact]}
    grace: 60s                     # optional
    conditions: [spo2_low]         # optional, the conditions scored (default: spo2_low ones)
  averaging: [4s, 8s, 12s]         # optional: estimator averaging times, 2s..30s (needs --data)

History comes from a store (--data DIR, opened read-only; stop the gateway
first, bbolt locks the file), from a running gateway (--gateway ADDR: a
snapshot taken through AdminService.Backup, admin role, into a temporary
directory and tuned exactly as --data would tune it, then deleted) or a
trend CSV (--in, "-" for stdin: t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi).
With several gateways (--gateway A,B,...) each gives a snapshot and their
trends are merged per device in time order (a device's history may be
split across gateways after a failover); two points of a device at the
same time keep the first listed gateway's, and the duplicates dropped are
counted on stderr. A gateway that cannot be reached fails the command.
Reference reviews, participants and averaging times need one gateway:
their records are per store and are not merged.

Averaging times re-run the estimator over the raw captures kept in the
store (serve --capture-raw), once per time, the way the gateway estimates
live (each device's ADC bits and recorded calibration; a restart on a rate
change, a device-clock jump over 1 s or a lost chunk); every profile is
swept over each, and summary.csv gets an 'averaging' column. Devices
without raw captures are left out with a warning (an error if --device
names one). The reference rule's events come from the trends at the
shortest averaging time and score every row alike. The re-estimated trends
are written to trends/averaging-T.csv, so 'pulsefleet replay --profile
profiles/NAME.yaml --in trends/averaging-T.csv' reproduces any row. With
--in, averaging is an error: a trend cannot be re-estimated.

Writes into --out: summary.csv (one row per profile), frontier.svg (alarms
per device-day against sensitivity, Pareto-optimal profiles marked),
report.html (self-contained) and profiles/NAME.yaml (each grid point, for
'pulsefleet replay --profile'). Episodes are counted exactly as 'replay'
counts them, by the same alarm engine.

Matching: an event is detected when a scored episode of the same device is
in alarm at some time between the event's start and its end + grace; an
episode is a true positive when its alarm span meets an event (+ grace).
Sensitivity = detected / events; PPV = true-positive / scored episodes.

With reference reviews (--data or --gateway: the operators' reviews of the
gateway's stored episodes, 'pulsefleet review'), the events are the
reviewed-positive episodes of the scored conditions (onset to end), matched
as above; per profile the report gives the reviewed-positive episodes it
still raises (sensitivity), the reviewed-negative ones it would avoid (no
scored episode matches them) and its alarms that match no reviewed episode
at all (unreviewed: nobody said whether they were real, so PPV is n/a).

Research tool, not a certified medical device: alarm settings are the
clinical team's decision.`

// tuneOptions are the flags of `pulsefleet tune`.
type tuneOptions struct {
	grid, data, in, out string
	devices             []string
	from, to            string
	workers             int
	maxGap              time.Duration
	client              clientFlags
	label               string   // the source's name in outputs, when not --data's
	stores              []string // snapshot data directories of several gateways, merged
}

func init() {
	register(command{
		name:    "tune",
		summary: tuneSummary,
		run: func(ctx context.Context, args []string, s stdio) error {
			var o tuneOptions
			fs := newFlagSet("tune", "--grid FILE (--data DIR | --gateway ADDR[,ADDR...] | --in TREND.csv) --out DIR [--device ID,...] [--from T] [--to T]", s.err)
			fs.StringVar(&o.grid, "grid", "", "tuning grid file (required)")
			fs.StringVar(&o.data, "data", "", "data directory of a store to read trend history from (read-only)")
			fs.StringVar(&o.in, "in", "", "trend CSV file, - for stdin (instead of --data)")
			o.client.register(fs)
			fs.StringVar(&o.out, "out", "", "output directory (required; created)")
			fs.Func("device", "only these devices (comma-separated; repeatable)", func(v string) error {
				for _, d := range strings.Split(v, ",") {
					if d = strings.TrimSpace(d); d != "" {
						o.devices = append(o.devices, d)
					}
				}
				return nil
			})
			fs.StringVar(&o.from, "from", "", "only samples at or after T: seconds on the trend clock (Unix seconds for --data) or RFC 3339")
			fs.StringVar(&o.to, "to", "", "only samples before T (as --from)")
			fs.IntVar(&o.workers, "workers", 0, "worker goroutines; 0 = GOMAXPROCS")
			fs.DurationVar(&o.maxGap, "max-gap", tune.DefaultMaxGap, "longest sample interval counted as monitored time")
			if err := parseFlags(fs, args); err != nil {
				return err
			}
			switch {
			case o.grid == "":
				return usagef("--grid is required")
			case o.out == "":
				return usagef("--out is required")
			case btoi(o.data != "")+btoi(o.in != "")+btoi(o.client.gateways != "") != 1:
				return usagef("--data, --gateway, --in: give exactly one")
			case o.workers < 0:
				return usagef("--workers %d, want >= 0", o.workers)
			case o.maxGap <= 0:
				return usagef("--max-gap %v, want > 0", o.maxGap)
			}
			var f tune.Filter
			f.Devices = o.devices
			var err error
			if o.from != "" {
				if f.From, err = parseTuneTime(o.from); err != nil {
					return usagef("--from: %v", err)
				}
				f.HasFrom = true
			}
			if o.to != "" {
				if f.To, err = parseTuneTime(o.to); err != nil {
					return usagef("--to: %v", err)
				}
				f.HasTo = true
			}
			if f.HasFrom && f.HasTo && !(f.To > f.From) {
				return usagef("--to %s, want after --from %s", o.to, o.from)
			}
			return runTune(ctx, o, f, args, s)
		},
	})
}

// parseTuneTime reads seconds on the trend clock or an RFC 3339 time (as
// Unix seconds).
func parseTuneTime(v string) (float64, error) {
	if f, err := strconv.ParseFloat(v, 64); err == nil {
		if f != f || f-f != 0 {
			return 0, fmt.Errorf("%q, want a finite number of seconds", v)
		}
		return f, nil
	}
	t, err := time.Parse(time.RFC3339, v)
	if err != nil {
		return 0, fmt.Errorf("%q, want seconds or an RFC 3339 time like 2026-11-20T08:00:00Z", v)
	}
	return float64(t.UnixMilli()) / 1000, nil
}

func btoi(b bool) int {
	if b {
		return 1
	}
	return 0
}

// tuneSnapshot takes a snapshot of each gateway's store into a temporary
// data directory for runTune (one gateway: o.data; several: o.stores, their
// trends merged by loadMergedTrends); cleanup removes them. A gateway that
// cannot give its snapshot fails the whole command, naming it.
func tuneSnapshot(ctx context.Context, o *tuneOptions, s stdio) (cleanup func(), err error) {
	addrs, err := o.client.addrs()
	if err != nil {
		return nil, err
	}
	if len(addrs) == 0 {
		return nil, usagef("--gateway: no address given")
	}
	dir, err := os.MkdirTemp("", "pulsefleet-tune-snapshot-")
	if err != nil {
		return nil, fmt.Errorf("tune: %w", err)
	}
	cleanup = func() { os.RemoveAll(dir) }
	var labels []string
	for i, addr := range addrs {
		sub := filepath.Join(dir, fmt.Sprintf("gateway-%d", i))
		if err := os.Mkdir(sub, 0o700); err != nil {
			cleanup()
			return nil, fmt.Errorf("tune: %w", err)
		}
		label := "snapshot"
		if len(addrs) > 1 {
			label = "snapshot " + addr
		}
		p := newTuneProgress(s.err, label)
		res, err := fetchBackup(ctx, &o.client, addr, filepath.Join(sub, store.FileName), func(done, total int64) { p.update(int(done>>10), int(total>>10)) })
		p.finish()
		if err != nil {
			cleanup()
			if !strings.Contains(err.Error(), addr) {
				err = fmt.Errorf("gateway %s: %w", addr, err)
			}
			return nil, err
		}
		o.stores = append(o.stores, sub)
		labels = append(labels, fmt.Sprintf("%s (store %s)", addr, res.storeID))
	}
	if len(addrs) == 1 {
		o.data, o.stores = o.stores[0], nil
		o.label = "snapshot of gateway " + labels[0]
		return cleanup, nil
	}
	o.label = "snapshots of gateways " + strings.Join(labels, ", ")
	return cleanup, nil
}

// tuneRefuseMerged refuses what cannot be merged across several gateways'
// stores (o.stores) and says why.
func tuneRefuseMerged(o tuneOptions, g *tune.Grid) error {
	if len(o.stores) == 0 {
		return nil
	}
	const each = "tune each gateway on its own (--gateway ADDR)"
	switch {
	case g.Reference.Reviews != nil:
		return fmt.Errorf("grid %s: reference reviews: refused with several gateways: a review names an episode by its id in one gateway's store, and two stores number their episodes independently, so the reviews cannot be merged safely; %s", o.grid, each)
	case len(g.Participants) > 0:
		return fmt.Errorf("grid %s: participants: refused with several gateways: each store keeps its own enrolments, and merging a participant's intervals across stores is not done; %s", o.grid, each)
	case g.HasAveraging():
		return fmt.Errorf("grid %s: averaging: refused with several gateways: raw captures are re-estimated per store and not merged; %s", o.grid, each)
	}
	return nil
}

// loadMergedTrends reads the trends of every store in dirs (one snapshot per
// gateway, in --gateway order) and merges them per device in time order: a
// device's history may be split across gateways (a failover). Where two
// stores hold a point of the same device at the same time, the first
// store's is kept (as a store keeps the first value at a device time) and
// the others are counted and reported on stderr.
func loadMergedTrends(dirs []string, f tune.Filter, s stdio) ([]alarms.Trend, error) {
	all := f
	all.Devices = nil // a device need only be in one store; checked on the merge
	byDev := map[string][]alarms.Sample{}
	stores := map[string]int{}
	for _, dir := range dirs {
		trends, err := tune.LoadStore(dir, all)
		if err != nil {
			return nil, err
		}
		for _, tr := range trends {
			byDev[tr.Device] = append(byDev[tr.Device], tr.Samples...)
			stores[tr.Device]++
		}
	}
	devs := make([]string, 0, len(byDev))
	for d := range byDev {
		devs = append(devs, d)
	}
	sort.Strings(devs)
	var merged []alarms.Trend
	dropped, split := 0, 0
	for _, d := range devs {
		smp := byDev[d]
		if stores[d] > 1 {
			split++
			sort.SliceStable(smp, func(i, j int) bool { return smp[i].T < smp[j].T })
			out := smp[:1]
			for _, x := range smp[1:] {
				if x.T == out[len(out)-1].T {
					dropped++
					continue
				}
				out = append(out, x)
			}
			smp = out
		}
		merged = append(merged, alarms.Trend{Device: d, Samples: smp})
	}
	fmt.Fprintf(s.err, "tune: merged %d gateways: %d devices, %d held by more than one; %d duplicate points (same device and time on two gateways) dropped, the first listed gateway's kept\n",
		len(dirs), len(devs), split, dropped)
	if len(f.Devices) > 0 {
		return tune.FilterTrends(merged, tune.Filter{Devices: f.Devices})
	}
	return merged, nil
}

func runTune(ctx context.Context, o tuneOptions, f tune.Filter, args []string, s stdio) error {
	if o.client.gateways != "" {
		cleanup, err := tuneSnapshot(ctx, &o, s)
		if err != nil {
			return err
		}
		defer cleanup()
	}
	g, err := tune.LoadGrid(o.grid)
	if err != nil {
		return err
	}
	if err := tuneRefuseMerged(o, g); err != nil {
		return err
	}
	if g.Reference.Reviews != nil {
		if o.data == "" {
			return fmt.Errorf("grid %s: reference reviews: needs --data or --gateway (the reviews are kept in the gateway's store); a trend CSV (--in) has none", o.grid)
		}
		if g.Reference.Reviewed, err = tune.LoadReviewed(o.data, f); err != nil {
			return err
		}
	}
	if len(g.Participants) > 0 && (o.data == "" || g.HasAveraging()) {
		return fmt.Errorf("grid %s: participants: needs --data or --gateway (the enrolments are kept in the gateway's store) and no averaging times", o.grid)
	}
	if g.HasAveraging() {
		if o.data == "" {
			return fmt.Errorf("grid %s: averaging: needs --data with raw captures; --in gives estimated trends, which cannot be re-estimated", o.grid)
		}
		return runTuneAveraging(ctx, o, f, g, args, s)
	}
	trends, source, err := loadTuneTrends(o, f, s)
	if err != nil {
		return err
	}
	if len(trends) == 0 {
		return fmt.Errorf("no trend samples in %s%s", source, tuneFilterNote(f))
	}
	var of []string
	if len(g.Participants) > 0 {
		ivs, err := tune.LoadEnrolments(o.data)
		if err != nil {
			return err
		}
		if trends, of, err = tune.ByParticipant(trends, ivs, g.Participants, g.Reference); err != nil {
			return fmt.Errorf("grid %s: %w", o.grid, err)
		}
	}
	prog := newTuneProgress(s.err, "tune")
	res, err := tune.Run(ctx, g, trends, tune.Options{Workers: o.workers, MaxGap: o.maxGap, Progress: prog.update, TrendParticipants: of})
	prog.finish()
	if err != nil {
		return err
	}
	fmt.Fprintf(s.out, "tune: %d profiles over %d devices, %.1f monitored hours, %d reference events (%s)\n",
		len(res.Points), res.Devices, res.MonitoredS/3600, res.Events, source)
	if res.Participants > 0 {
		fmt.Fprintf(s.out, "tune: %d participants, %.1f participant-monitored hours\n", res.Participants, res.ParticipantS/3600)
	}
	return tuneWrite(o, f, res, source, args, s)
}

// loadTuneTrends reads the trends to tune on, from the store (--data) or a
// trend CSV (--in), and names where they came from.
func loadTuneTrends(o tuneOptions, f tune.Filter, s stdio) ([]alarms.Trend, string, error) {
	var trends []alarms.Trend
	var err error
	source := ""
	if len(o.stores) > 0 {
		if trends, err = loadMergedTrends(o.stores, f, s); err != nil {
			return nil, "", err
		}
		source = o.label
	} else if o.data != "" {
		source = "store " + o.data
		if o.label != "" {
			source = o.label
		}
		if trends, err = tune.LoadStore(o.data, f); err != nil {
			return nil, "", err
		}
	} else {
		source = o.in
		var in io.Reader = s.in
		if o.in != "-" {
			fh, err := os.Open(o.in)
			if err != nil {
				return nil, "", fmt.Errorf("open trend: %w", err)
			}
			defer fh.Close()
			in = fh
		}
		all, err := alarms.ReadTrendCSV(in)
		if err != nil {
			return nil, "", fmt.Errorf("%s: %w", o.in, err)
		}
		if trends, err = tune.FilterTrends(all, f); err != nil {
			return nil, "", err
		}
	}
	return trends, source, nil
}

// runTuneAveraging re-estimates the store's raw captures at each averaging
// time of g and sweeps the grid over them.
func runTuneAveraging(ctx context.Context, o tuneOptions, f tune.Filter, g *tune.Grid, args []string, s stdio) error {
	prog := newTuneProgress(s.err, "estimate")
	est, err := tune.EstimateStore(ctx, o.data, f, g.AveragingS, tune.EstimateOptions{Workers: o.workers, Progress: prog.update})
	prog.finish()
	if err != nil {
		return err
	}
	used := len(est.Trends[0])
	if n := len(est.Skipped); n > 0 {
		fmt.Fprintf(s.err, "tune: warning: %d of %d devices have no raw captures%s and are left out: %s\n",
			n, n+used, tuneFilterNote(f), tuneList(est.Skipped, 10))
	}
	prog = newTuneProgress(s.err, "tune")
	res, err := tune.RunEstimated(ctx, g, est, tune.Options{Workers: o.workers, MaxGap: o.maxGap, Progress: prog.update})
	prog.finish()
	if err != nil {
		return err
	}
	source := "raw captures in store " + o.data
	if o.label != "" {
		source = "raw captures in the " + o.label
	}
	fmt.Fprintf(s.out, "tune: %d profiles (%d averaging times x %d) over %d devices with raw captures (of %d in the store), "+
		"%d raw chunks re-estimated, %.1f monitored hours, %d reference events (rule on the %s trends)\n",
		len(res.Points), len(g.AveragingS), len(res.Points)/len(g.AveragingS), used, used+len(est.Skipped),
		est.Chunks, res.MonitoredS/3600, res.Events, res.ReferenceAveraging)
	return tuneWrite(o, f, res, source, args, s)
}

// tuneList is up to max names, then how many more.
func tuneList(names []string, max int) string {
	if len(names) <= max {
		return strings.Join(names, ", ")
	}
	return fmt.Sprintf("%s and %d more", strings.Join(names[:max], ", "), len(names)-max)
}

// tuneWrite writes the outputs and prints the best profiles.
func tuneWrite(o tuneOptions, f tune.Filter, res *tune.Result, source string, args []string, s stdio) error {
	if rs := res.Grid.Reference.Reviews; rs != nil {
		fmt.Fprintf(s.out, "tune: reviewed episodes of the scored conditions: %d positive (%s), %d negative (%s), %d reviewed otherwise (scored as neither); %d outside the data\n",
			res.ReviewedPositive, strings.Join(rs.Positive, ", "), res.ReviewedNegative, strings.Join(rs.Negative, ", "), res.ReviewedOther, res.ReviewsOutside)
	}
	info := tune.ReportInfo{Source: source, Filters: f.String(), Command: "pulsefleet tune " + strings.Join(args, " ")}
	if err := tune.WriteOutputs(o.out, res, info); err != nil {
		return err
	}
	fmt.Fprintf(s.out, "best profiles (fewest alarms first, Pareto-optimal):\n")
	for k, i := range tune.BestRows(res) {
		if k == 5 {
			fmt.Fprintf(s.out, "  ... see %s/report.html\n", o.out)
			break
		}
		r := res.Rows[i]
		if res.Grid.Reference.Reviews != nil {
			fmt.Fprintf(s.out, "  %-28s %6.2f alarms/device-day  reviewed positives raised %d/%d  reviewed negatives avoided %d/%d  unreviewed alarms %d  (%s)\n",
				safeCell(res.Points[i].Name), r.PerDeviceDay, r.EventsDetected, res.ReviewedPositive, r.NegativesAvoided, res.ReviewedNegative,
				r.UnreviewedAlarms, tuneDescribeValues(res, i))
			continue
		}
		fmt.Fprintf(s.out, "  %-28s %6.2f alarms/device-day  sensitivity %s  ppv %s  (%s)\n", safeCell(res.Points[i].Name),
			r.PerDeviceDay, tunePct(r.Sensitivity), tunePct(r.PPV), tuneDescribeValues(res, i))
	}
	if res.Estimated != nil {
		fmt.Fprintf(s.out, "wrote %s/summary.csv, frontier.svg, report.html, profiles/, trends/\n", o.out)
	} else {
		fmt.Fprintf(s.out, "wrote %s/summary.csv, frontier.svg, report.html, profiles/\n", o.out)
	}
	fmt.Fprintln(s.out, tune.Caution)
	return nil
}

func tuneFilterNote(f tune.Filter) string {
	if d := f.String(); d != "" {
		return " (" + d + ")"
	}
	return ""
}

func tunePct(f float64) string {
	if f != f {
		return "  n/a"
	}
	return fmt.Sprintf("%4.0f%%", 100*f)
}

func tuneDescribeValues(res *tune.Result, i int) string {
	var parts []string
	for k, sw := range res.Grid.Sweep {
		parts = append(parts, sw.Key+"="+res.Points[i].Values[k])
	}
	return strings.Join(parts, " ")
}

// tuneProgress draws a bar on a terminal, or prints a plain line every 25 %
// otherwise, headed by its label.
type tuneProgress struct {
	line  *progress.Line
	label string
	start time.Time
	last  int // last quarter printed (plain)
	done  bool
}

func newTuneProgress(w io.Writer, label string) *tuneProgress {
	return &tuneProgress{line: progress.New(w, 0), label: label, start: time.Now(), last: -1}
}

func (p *tuneProgress) update(done, total int) {
	if total <= 0 || p.done {
		return
	}
	frac := float64(done) / float64(total)
	if p.line.Terminal() {
		const width = 30
		n := int(frac * width)
		p.line.Draw("%-8s [%s%s] %3.0f%% %5.1fs", p.label, strings.Repeat("#", n), strings.Repeat(".", width-n), 100*frac, time.Since(p.start).Seconds())
		return
	}
	if q := int(frac * 4); q > p.last {
		p.last = q
		p.line.Println("%s: %d/%d units done (%.0f%%)", p.label, done, total, 100*frac)
	}
}

func (p *tuneProgress) finish() {
	p.line.End("")
	p.done = true
}
