package main

import (
	"context"
	"encoding/csv"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/participants"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "trend",
		summary: "Print a device's trend from one or more running gateways as CSV (merged across shards).\n\n" +
			"Raw points come in the replay/tune trend format (t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi), so the\n" +
			"output can be replayed; with --step, one row per step with min/mean/max. After a fleet is resharded a\n" +
			"device's history may sit on several gateways: every gateway given is asked and the answers merged.\n" +
			"A gateway that cannot be read leaves the others' points written, marked: \"# incomplete:\" comment\n" +
			"lines after the caution (readers skip them) and INCOMPLETE on stderr name it and what the reachable\n" +
			"gateways' ledgers show missing; the command exits 3.",
		run: runTrend,
	})
}

func runTrend(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("trend", "--gateway ADDR[,ADDR...] (--device ID | --participant PID) [--from T] [--to T] [--step DUR]", s.err)
	cf.register(fs)
	device := fs.String("device", "", "device id (this or --participant)")
	pid := fs.String("participant", "", "participant id: their devices' trend inside their enrolments, stitched, with a participant column")
	fromArg := fs.String("from", "24h", "start: RFC 3339, Unix seconds, or a duration before now (24h)")
	toArg := fs.String("to", "", "end: RFC 3339 or Unix seconds (default now)")
	step := fs.Duration("step", 0, "downsampling step (0 = every point)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if (*device == "") == (*pid == "") {
		return usagef("--device, --participant: give exactly one")
	}
	if *pid != "" {
		if err := participants.CheckID("--participant", *pid); err != nil {
			return usagef("%v", err)
		}
	}
	now := time.Now()
	from, err := parseTrendTime("--from", *fromArg, now)
	if err != nil {
		return err
	}
	to := now
	if *toArg != "" {
		if to, err = parseTrendTime("--to", *toArg, now); err != nil {
			return err
		}
	}
	if !to.After(from) {
		return usagef("--to %s is not after --from %s", to.Format(time.RFC3339), from.Format(time.RFC3339))
	}
	if *step < 0 || (*step > 0 && *step < time.Second) {
		return usagef("--step %v, want 0 or at least 1s", *step)
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	if *pid != "" {
		return participantTrend(ctx, &cf, addrs, *pid, from, to, *step, s)
	}
	req := &pb.QueryTrendRequest{DeviceId: *device, FromUnixMs: from.UnixMilli(), ToUnixMs: to.UnixMilli(), StepMs: step.Milliseconds()}
	points, buckets, failed, err := queryTrend(ctx, &cf, addrs, req, s)
	if err != nil {
		return err
	}
	reachable := reachableOf(addrs, failed)
	if len(points) == 0 && len(buckets) == 0 {
		// An empty answer is either a known device without data in the
		// range or a device no gateway knows: say which, and fail for the
		// second.
		if err := anyGatewayKnows(ctx, &cf, reachable, *device); err != nil {
			return err
		}
	}
	// A gateway that could not be read: the others' points, marked.
	gaps := findGaps(ctx, &cf, reachable, failed, []string{*device})
	notes := gaps.notes("trend points", 1000)
	if *step > 0 {
		err = writeBuckets(s.out, *device, "", mergeBuckets(buckets), true, notes...)
	} else {
		err = writeTrendPoints(s.out, *device, "", mergePoints(points), true, notes...)
	}
	if err != nil {
		return err
	}
	printGaps(s.err, "trend", gaps, "trend points")
	return incomplete("trend points", len(addrs), failed)
}

// queryTrend asks every gateway for req and returns the answers unmerged;
// a gateway that cannot be read is returned in failed (the others' answers
// are kept).
func queryTrend(ctx context.Context, cf *clientFlags, addrs []string, req *pb.QueryTrendRequest, s stdio) ([]*pb.TrendPoint, []*pb.TrendBucket, []gatewayError, error) {
	var points []*pb.TrendPoint
	var buckets []*pb.TrendBucket
	var failed []gatewayError
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return nil, nil, nil, err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), time.Minute)
		resp, err := pb.NewFleetServiceClient(conn).QueryTrend(cctx, req)
		cancel()
		conn.Close()
		if err != nil {
			failed = append(failed, gatewayError{a, err})
			continue
		}
		if resp.GetTruncated() {
			fmt.Fprintf(s.err, "pulsefleet trend: gateway %s cut its answer at its point limit; use --step or a shorter range\n", a)
		}
		points = append(points, resp.GetPoints()...)
		buckets = append(buckets, resp.GetBuckets()...)
	}
	if len(failed) == len(addrs) {
		return nil, nil, nil, gatewayFailures("trend points", len(addrs), failed)
	}
	return points, buckets, failed, nil
}

// participantTrend writes pid's history: each enrolled device's trend
// inside its enrolment, with a participant column, in time order (then by
// device): a participant wearing two devices at once (a prototype and a
// reference oximeter) gets their rows interleaved by time.
func participantTrend(ctx context.Context, cf *clientFlags, addrs []string, pid string, from, to time.Time, step time.Duration, s stdio) error {
	ivs, err := remoteEnrolments(ctx, cf, addrs)
	if err != nil {
		return err
	}
	segs := participants.Stitch(ivs, pid, from.UnixMilli(), to.UnixMilli())
	if len(segs) == 0 {
		return fmt.Errorf("NotFound: participant %s has no enrolment between %s and %s on %s", pid,
			from.UTC().Format(time.RFC3339), to.UTC().Format(time.RFC3339), strings.Join(addrs, ", "))
	}
	failedAt := map[string]gatewayError{}
	var (
		points  []deviceRow[*pb.TrendPoint]
		buckets []deviceRow[*pb.TrendBucket]
	)
	for _, sg := range segs {
		req := &pb.QueryTrendRequest{DeviceId: sg.Device, FromUnixMs: sg.FromMS, ToUnixMs: sg.ToMS, StepMs: step.Milliseconds()}
		ps, bs, failed, err := queryTrend(ctx, cf, addrs, req, s)
		if err != nil {
			return err
		}
		for _, f := range failed {
			failedAt[f.Addr] = f
		}
		for _, b := range mergeBuckets(bs) {
			buckets = append(buckets, deviceRow[*pb.TrendBucket]{sg.Device, b.GetStartUnixMs(), b})
		}
		for _, p := range mergePoints(ps) {
			points = append(points, deviceRow[*pb.TrendPoint]{sg.Device, p.GetTimeUnixMs(), p})
		}
	}
	if step > 0 {
		err = writeByTime(buckets, func(device string, run []*pb.TrendBucket, head bool) error {
			return writeBuckets(s.out, device, pid, run, head)
		})
	} else {
		err = writeByTime(points, func(device string, run []*pb.TrendPoint, head bool) error {
			return writeTrendPoints(s.out, device, pid, run, head)
		})
	}
	if err != nil {
		return err
	}
	var failed []gatewayError
	for _, a := range addrs {
		if f, ok := failedAt[a]; ok {
			failed = append(failed, f)
		}
	}
	for _, f := range failed {
		fmt.Fprintf(s.err, "pulsefleet trend: INCOMPLETE: gateway %s could not be read (%s): the trend points it holds are missing here\n", f.Addr, safeText(errorText(f.Err)))
	}
	return incomplete("trend points", len(addrs), failed)
}

// deviceRow is one device's trend row (a point or a step) at a time.
type deviceRow[T any] struct {
	device string
	ms     int64
	v      T
}

// writeByTime orders rows by time, then device, and writes them as runs of
// one device each; the first call (head true) also writes the head, even
// when there are no rows.
func writeByTime[T any](rows []deviceRow[T], write func(device string, run []T, head bool) error) error {
	sort.SliceStable(rows, func(i, j int) bool {
		if rows[i].ms != rows[j].ms {
			return rows[i].ms < rows[j].ms
		}
		return rows[i].device < rows[j].device
	})
	if len(rows) == 0 {
		return write("", nil, true)
	}
	for i := 0; i < len(rows); {
		j := i
		var run []T
		for ; j < len(rows) && rows[j].device == rows[i].device; j++ {
			run = append(run, rows[j].v)
		}
		if err := write(rows[i].device, run, i == 0); err != nil {
			return err
		}
		i = j
	}
	return nil
}

// anyGatewayKnows returns nil when at least one gateway knows the device,
// and an error saying NotFound when none does.
func anyGatewayKnows(ctx context.Context, cf *clientFlags, addrs []string, device string) error {
	for _, a := range addrs {
		conn, err := cf.dial(a)
		if err != nil {
			return err
		}
		cctx, cancel := context.WithTimeout(cf.ctx(ctx), time.Minute)
		_, err = pb.NewFleetServiceClient(conn).GetDevice(cctx, &pb.GetDeviceRequest{DeviceId: device})
		cancel()
		conn.Close()
		if err == nil {
			return nil
		}
		if status.Code(err) != codes.NotFound {
			return fmt.Errorf("gateway %s: %w", a, err)
		}
	}
	return fmt.Errorf("NotFound: device %q is not known to %s (no trend and no device record)", device, strings.Join(addrs, ", "))
}

func parseTrendTime(flag, v string, now time.Time) (time.Time, error) {
	if t, err := time.Parse(time.RFC3339, v); err == nil {
		return t, nil
	}
	if sec, err := strconv.ParseFloat(v, 64); err == nil {
		return time.UnixMilli(int64(sec * 1000)), nil
	}
	if d, err := time.ParseDuration(v); err == nil && d > 0 {
		return now.Add(-d), nil
	}
	return time.Time{}, usagef("%s %q: want RFC 3339, Unix seconds or a duration such as 24h", flag, v)
}

// mergePoints orders points from several gateways by time, one per time.
func mergePoints(ps []*pb.TrendPoint) []*pb.TrendPoint {
	sort.SliceStable(ps, func(i, j int) bool { return ps[i].GetTimeUnixMs() < ps[j].GetTimeUnixMs() })
	out := ps[:0]
	for _, p := range ps {
		if n := len(out); n > 0 && out[n-1].GetTimeUnixMs() == p.GetTimeUnixMs() {
			continue
		}
		out = append(out, p)
	}
	return out
}

// mergeBuckets combines steps from several gateways that cover the same start.
func mergeBuckets(bs []*pb.TrendBucket) []*pb.TrendBucket {
	sort.SliceStable(bs, func(i, j int) bool { return bs[i].GetStartUnixMs() < bs[j].GetStartUnixMs() })
	var out []*pb.TrendBucket
	for _, b := range bs {
		n := len(out)
		if n == 0 || out[n-1].GetStartUnixMs() != b.GetStartUnixMs() {
			out = append(out, b)
			continue
		}
		a := out[n-1]
		a.Points += b.Points
		a.Spo2Pct, a.PulseBpm, a.PiPct, a.Sqi = mergeStat(a.Spo2Pct, b.Spo2Pct), mergeStat(a.PulseBpm, b.PulseBpm), mergeStat(a.PiPct, b.PiPct), mergeStat(a.Sqi, b.Sqi)
	}
	return out
}

func mergeStat(a, b *pb.Stat) *pb.Stat {
	switch {
	case a.GetCount() == 0:
		return b
	case b.GetCount() == 0:
		return a
	}
	n := a.Count + b.Count
	return &pb.Stat{Count: n, Min: math.Min(a.Min, b.Min), Max: math.Max(a.Max, b.Max),
		Mean: (a.Mean*float64(a.Count) + b.Mean*float64(b.Count)) / float64(n)}
}

func optCell(v *float64, prec int) string {
	if v == nil {
		return ""
	}
	return strconv.FormatFloat(*v, 'f', prec, 64)
}

// writeTrendPoints writes points as trend CSV; with pid, a participant
// column too. head writes the caution line, the notes as "# incomplete:"
// comment lines (a merged answer without a gateway) and the header first.
func writeTrendPoints(w io.Writer, device, pid string, ps []*pb.TrendPoint, head bool, notes ...string) error {
	cw := csv.NewWriter(w)
	if head {
		if err := writeCSVHead(w, notes); err != nil {
			return err
		}
		cw.Write(withParticipant(pid, "t_s", "device", "spo2_pct", "pulse_bpm", "pi_pct", "sqi", "ratio", "flags", "source"))
	}
	for _, p := range ps {
		src := "gateway"
		if p.GetSource() == pb.Source_SOURCE_DEVICE {
			src = "device"
		}
		cw.Write(withParticipant(pid, strconv.FormatFloat(float64(p.GetTimeUnixMs())/1000, 'f', 3, 64), device,
			optCell(p.Spo2Pct, 1), optCell(p.PulseBpm, 1), optCell(p.PiPct, 3), optCell(p.Sqi, 3), optCell(p.Ratio, 4),
			strconv.FormatUint(uint64(p.GetFlags()), 10), src))
	}
	cw.Flush()
	return cw.Error()
}

// withParticipant returns cells, with pid appended when it is not "" (the
// header's cell is "participant").
func withParticipant(pid string, cells ...string) []string {
	if pid == "" {
		return cells
	}
	if cells[0] == "t_s" || cells[0] == "start_s" {
		return append(cells, "participant")
	}
	return append(cells, pid)
}

// writeBuckets writes steps as CSV; pid, head and notes as for writeTrendPoints.
func writeBuckets(w io.Writer, device, pid string, bs []*pb.TrendBucket, head bool, notes ...string) error {
	cw := csv.NewWriter(w)
	if head {
		if err := writeCSVHead(w, notes); err != nil {
			return err
		}
		cw.Write(withParticipant(pid, "start_s", "device", "points", "spo2_min", "spo2_mean", "spo2_max", "pulse_min", "pulse_mean", "pulse_max", "pi_mean", "sqi_mean"))
	}
	stat := func(s *pb.Stat, f float64, prec int) string {
		if s.GetCount() == 0 {
			return ""
		}
		return strconv.FormatFloat(f, 'f', prec, 64)
	}
	for _, b := range bs {
		cw.Write(withParticipant(pid, strconv.FormatFloat(float64(b.GetStartUnixMs())/1000, 'f', 0, 64), device, strconv.FormatUint(uint64(b.GetPoints()), 10),
			stat(b.Spo2Pct, b.Spo2Pct.GetMin(), 1), stat(b.Spo2Pct, b.Spo2Pct.GetMean(), 2), stat(b.Spo2Pct, b.Spo2Pct.GetMax(), 1),
			stat(b.PulseBpm, b.PulseBpm.GetMin(), 1), stat(b.PulseBpm, b.PulseBpm.GetMean(), 2), stat(b.PulseBpm, b.PulseBpm.GetMax(), 1),
			stat(b.PiPct, b.PiPct.GetMean(), 3), stat(b.Sqi, b.Sqi.GetMean(), 3)))
	}
	cw.Flush()
	return cw.Error()
}
