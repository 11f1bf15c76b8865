package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"sort"
	"strconv"
	"strings"
	"time"

	"google.golang.org/protobuf/encoding/protojson"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/participants"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "episodes",
		summary: `List stored alarm episodes of one or more running gateways, newest onset first, with their review.
Per episode: the gateway that stored it and its id there (episode ids are per
gateway), device, condition, priority, onset, announced, ended, lowest SpO2,
who acknowledged it, and the newest review (label, reviewer, when, note,
revision). --participant PID keeps the episodes whose onset lies in one of
the participant's enrolments.

Several gateways (comma-separated) are merged into one list, newest onset
first. An episode stored on two gateways (the same device, condition and
onset: a device that moved during it) is listed once, from the gateway
holding most of it, and the number dropped is said on stderr. A gateway that
cannot be read does not stop the others: the listing says INCOMPLETE, names
it and the devices whose history the reachable gateways' ledgers show to be
partly elsewhere (stderr; "# incomplete:" comment lines in the CSV;
"incomplete": true and "gaps" in the JSON), and the command exits 3, so a
script cannot take a partial listing for a whole one. The CSV is the review
export (one row per episode, empty review columns when unreviewed);
'pulsefleet reviews' exports every revision.`,
		run: runEpisodes,
	})
}

// episodeColumns is the CSV header (times RFC 3339 UTC; empty = not happened).
var episodeColumns = []string{"gateway", "episode_id", "device", "condition", "priority", "onset", "announced", "ended",
	"min_spo2_pct", "acknowledged_by", "acknowledged", "review", "reviewer", "reviewed", "review_note", "review_revision"}

// episodeLimit is how many episodes one ListEpisodes call may return.
const episodeLimit = 10_000

// episodeRow is one episode with its gateway and newest review (nil = none).
type episodeRow struct {
	Gateway string
	Episode *pb.Episode
	Review  *pb.EpisodeReview
}

func runEpisodes(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("episodes", "--gateway ADDR[,ADDR...] [--device ID] [--participant PID] [--since DUR] [--format table|csv|json]", s.err)
	cf.register(fs)
	device := fs.String("device", "", "only this device")
	since := fs.Duration("since", 0, "only episodes with onset within this long before now (0 = every stored episode)")
	format := fs.String("format", "table", "output: table (readable), csv or json")
	pid := fs.String("participant", "", "only episodes of this participant: onset inside one of their enrolments")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *pid != "" {
		if err := participants.CheckID("--participant", *pid); err != nil {
			return usagef("%v", err)
		}
	}
	switch *format {
	case "table", "csv", "json":
	default:
		return usagef("--format: %q, want table, csv or json", *format)
	}
	if *since < 0 {
		return usagef("--since %v, want 0 or more", *since)
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	var fromMS int64
	if *since > 0 {
		fromMS = time.Now().Add(-*since).UnixMilli()
	}
	all, failed := fetchEpisodes(ctx, &cf, addrs, *device, fromMS)
	rows, dups := dropDuplicateEpisodes(all)
	conflicts := activeElsewhere(all, rows)
	reachable := reachableOf(addrs, failed)
	if *pid != "" {
		ivs, err := remoteEnrolments(ctx, &cf, reachable)
		if err != nil {
			return err
		}
		rows = participantEpisodes(rows, ivs, *pid)
	}
	for _, a := range addrs {
		if n := countGateway(rows, a); n >= episodeLimit {
			fmt.Fprintf(s.err, "pulsefleet episodes: warning: gateway %s gave its limit of %d episodes; older ones are not listed (narrow with --since or --device)\n", a, episodeLimit)
		}
	}
	var only []string
	if *device != "" {
		only = []string{*device}
	}
	gaps := findGaps(ctx, &cf, reachable, failed, only)
	switch *format {
	case "csv":
		err = writeEpisodesCSV(s.out, rows, gaps.notes("episodes", 1000))
	case "json":
		err = writeEpisodesJSON(s.out, rows, failed, gaps, dups)
	default:
		err = writeEpisodesTable(s.out, rows, len(addrs) > 1)
	}
	if err != nil {
		return err
	}
	if dups > 0 {
		fmt.Fprintf(s.err, "pulsefleet episodes: %d episodes stored on two gateways (a device moved during the episode) are listed once, from the gateway with the most of it\n", dups)
	}
	for _, c := range conflicts {
		fmt.Fprintf(s.err, "pulsefleet episodes: warning: %s\n", safeText(c))
	}
	printGaps(s.err, "episodes", gaps, "episodes")
	return incomplete("episodes", len(addrs), failed)
}

// dropDuplicateEpisodes keeps one row per episode stored on several
// gateways (the same device, condition and onset: after a failover the
// survivor goes on with the episode its predecessor stored): the one that
// has most of it (not moved away, then ended, then acknowledged, then
// reviewed, then announced, then the later end). A copy on a gateway the
// device left goes on elsewhere, so the copy where it went wins even when the
// old one holds an acknowledgement. Order is kept; it returns how many were dropped.
func dropDuplicateEpisodes(rows []episodeRow) ([]episodeRow, int) {
	type key struct {
		dev, cond string
		onset     int64
	}
	keyOf := func(r episodeRow) key {
		return key{r.Episode.GetDeviceId(), r.Episode.GetCondition(), r.Episode.GetOnsetUnixMs()}
	}
	best := map[key]int{}
	for i, r := range rows {
		k := keyOf(r)
		if j, ok := best[k]; !ok || episodeRank(r).after(episodeRank(rows[j])) {
			best[k] = i
		}
	}
	out := rows[:0:0]
	for i, r := range rows {
		if best[keyOf(r)] == i {
			out = append(out, r)
		}
	}
	return out, len(rows) - len(out)
}

// activeElsewhere lists the dropped copies that are still active where the
// kept copy is not (a copy stored by a gateway the device left may be
// stale, or the kept one may be): the listing never silently hides an
// active copy, it says which.
func activeElsewhere(all, kept []episodeRow) []string {
	type key struct {
		dev, cond string
		onset     int64
	}
	keptBy := map[key]episodeRow{}
	for _, r := range kept {
		keptBy[key{r.Episode.GetDeviceId(), r.Episode.GetCondition(), r.Episode.GetOnsetUnixMs()}] = r
	}
	var out []string
	for _, r := range all {
		k := key{r.Episode.GetDeviceId(), r.Episode.GetCondition(), r.Episode.GetOnsetUnixMs()}
		if kr := keptBy[k]; kr.Episode != r.Episode && r.Episode.GetActive() && !kr.Episode.GetActive() {
			out = append(out, fmt.Sprintf("%s %s (onset %s): listed from %s (episode %d, not active), but %s holds it as active (episode %d)",
				r.Episode.GetDeviceId(), r.Episode.GetCondition(), msTime(k.onset), kr.Gateway, kr.Episode.GetEpisodeId(), r.Gateway, r.Episode.GetEpisodeId()))
		}
	}
	return out
}

// rank orders copies of one episode by how much of it they hold.
type rank [6]int64

func (a rank) after(b rank) bool {
	for i := range a {
		if a[i] != b[i] {
			return a[i] > b[i]
		}
	}
	return false
}

func episodeRank(r episodeRow) rank {
	e := r.Episode
	b := func(v bool) int64 {
		if v {
			return 1
		}
		return 0
	}
	return rank{b(e.GetMovedToGateway() == ""), b(e.GetEndedUnixMs() > 0), b(e.GetAcknowledgedUnixMs() > 0), b(r.Review != nil), b(e.GetAnnouncedUnixMs() > 0), e.GetEndedUnixMs()}
}

// participantEpisodes keeps the rows whose onset lies in one of pid's
// enrolments on the episode's device.
func participantEpisodes(rows []episodeRow, ivs []participants.Interval, pid string) []episodeRow {
	out := rows[:0]
	for _, r := range rows {
		if participants.Holder(ivs, r.Episode.GetDeviceId(), r.Episode.GetOnsetUnixMs()) == pid {
			out = append(out, r)
		}
	}
	return out
}

// gatewayError is a gateway that could not be read.
type gatewayError struct {
	Addr string
	Err  error
}

// gatewayFailures is the error of a merged listing that lacks gateways: it
// names each and what went wrong (nil when none failed).
func gatewayFailures(what string, total int, failed []gatewayError) error {
	if len(failed) == 0 {
		return nil
	}
	var parts []string
	for _, f := range failed {
		parts = append(parts, fmt.Sprintf("gateway %s: %v", f.Addr, f.Err))
	}
	return fmt.Errorf("%d of %d gateways could not be read, so the %s listed lack theirs: %s",
		len(failed), total, what, strings.Join(parts, "; "))
}

func countGateway(rows []episodeRow, addr string) int {
	n := 0
	for _, r := range rows {
		if r.Gateway == addr {
			n++
		}
	}
	return n
}

// fetchEpisodes reads every gateway's episodes and newest reviews; a
// gateway that fails is returned in failed, the others' rows are kept.
// Rows are ordered by onset, newest first (then gateway, then id).
func fetchEpisodes(ctx context.Context, cf *clientFlags, addrs []string, device string, fromMS int64) (rows []episodeRow, failed []gatewayError) {
	for _, a := range addrs {
		got, err := gatewayEpisodes(ctx, cf, a, device, fromMS)
		if err != nil {
			failed = append(failed, gatewayError{a, err})
			continue
		}
		rows = append(rows, got...)
	}
	sort.SliceStable(rows, func(i, j int) bool {
		ei, ej := rows[i].Episode, rows[j].Episode
		if ei.GetOnsetUnixMs() != ej.GetOnsetUnixMs() {
			return ei.GetOnsetUnixMs() > ej.GetOnsetUnixMs()
		}
		if rows[i].Gateway != rows[j].Gateway {
			return rows[i].Gateway < rows[j].Gateway
		}
		return ei.GetEpisodeId() > ej.GetEpisodeId()
	})
	return rows, failed
}

func gatewayEpisodes(ctx context.Context, cf *clientFlags, addr, device string, fromMS int64) ([]episodeRow, error) {
	conn, err := cf.dial(addr)
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	fc := pb.NewFleetServiceClient(conn)
	eps, err := fc.ListEpisodes(cctx, &pb.ListEpisodesRequest{DeviceId: device, FromUnixMs: fromMS, Limit: episodeLimit})
	if err != nil {
		return nil, err
	}
	rvs, err := fc.ListReviews(cctx, &pb.ListReviewsRequest{DeviceId: device})
	if err != nil {
		return nil, fmt.Errorf("reviews: %w", err)
	}
	byID := map[uint64]*pb.EpisodeReview{}
	for _, r := range rvs.GetReviews() {
		byID[r.GetEpisodeId()] = r
	}
	out := make([]episodeRow, 0, len(eps.GetEpisodes()))
	for _, e := range eps.GetEpisodes() {
		out = append(out, episodeRow{Gateway: addr, Episode: e, Review: byID[e.GetEpisodeId()]})
	}
	return out, nil
}

// msTime is an RFC 3339 UTC time, or "" for 0 (not happened).
func msTime(ms int64) string {
	if ms == 0 {
		return ""
	}
	return time.UnixMilli(ms).UTC().Format(time.RFC3339)
}

func priorityWord(p pb.Priority) string {
	if p == pb.Priority_PRIORITY_UNSPECIFIED {
		return ""
	}
	return strings.TrimPrefix(strings.ToLower(p.String()), "priority_")
}

// episodeCells are a row's values in episodeColumns order.
func episodeCells(r episodeRow) []string {
	e, rv := r.Episode, r.Review
	cells := []string{r.Gateway, strconv.FormatUint(e.GetEpisodeId(), 10), e.GetDeviceId(), e.GetCondition(),
		priorityWord(e.GetPriority()), msTime(e.GetOnsetUnixMs()), msTime(e.GetAnnouncedUnixMs()), msTime(e.GetEndedUnixMs()),
		estCell(e.MinSpo2Pct, 1), e.GetAcknowledgedBy(), msTime(e.GetAcknowledgedUnixMs())}
	if rv == nil {
		return append(cells, "", "", "", "", "")
	}
	return append(cells, rv.GetLabel(), rv.GetReviewer(), msTime(rv.GetReviewedUnixMs()), rv.GetNote(), strconv.FormatUint(uint64(rv.GetRevision()), 10))
}

// writeEpisodesCSV writes the review export; notes (a merged answer's gaps)
// become "# incomplete:" comment lines after the caution.
func writeEpisodesCSV(w io.Writer, rows []episodeRow, notes []string) error {
	if err := writeCSVHead(w, notes); err != nil {
		return err
	}
	cw := csv.NewWriter(w)
	if err := cw.Write(episodeColumns); err != nil {
		return err
	}
	for _, r := range rows {
		if err := cw.Write(episodeCells(r)); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}

// writeEpisodesJSON writes the episodes with, when the answer is merged
// without a gateway, "incomplete": true and the gaps, and the number of
// duplicates dropped.
func writeEpisodesJSON(w io.Writer, rows []episodeRow, failed []gatewayError, gaps *historyGaps, dups int) error {
	mo := protojson.MarshalOptions{UseProtoNames: true}
	type item struct {
		Gateway string          `json:"gateway"`
		Episode json.RawMessage `json:"episode"`
		Review  json.RawMessage `json:"review,omitempty"`
	}
	out := struct {
		Caution     string       `json:"caution"`
		Incomplete  bool         `json:"incomplete"`
		Episodes    []item       `json:"episodes"`
		Duplicates  int          `json:"duplicates_dropped"`
		Unreachable []string     `json:"unreadable_gateways,omitempty"`
		Gaps        *historyGaps `json:"gaps,omitempty"`
	}{Caution: caution.Text, Episodes: []item{}, Incomplete: gaps != nil, Duplicates: dups, Gaps: gaps}
	for _, r := range rows {
		eb, err := mo.Marshal(r.Episode)
		if err != nil {
			return err
		}
		it := item{Gateway: r.Gateway, Episode: eb}
		if r.Review != nil {
			rv := &pb.EpisodeReview{EpisodeId: r.Review.GetEpisodeId(), DeviceId: r.Review.GetDeviceId(), Label: r.Review.GetLabel(),
				Note: r.Review.GetNote(), Reviewer: r.Review.GetReviewer(), ReviewedUnixMs: r.Review.GetReviewedUnixMs(), Revision: r.Review.GetRevision()}
			if it.Review, err = mo.Marshal(rv); err != nil {
				return err
			}
		}
		out.Episodes = append(out.Episodes, it)
	}
	for _, f := range failed {
		out.Unreachable = append(out.Unreachable, f.Addr)
	}
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(out)
}

func writeEpisodesTable(w io.Writer, rows []episodeRow, withGateway bool) error {
	head := []string{"EPISODE", "DEVICE", "CONDITION", "PRIORITY", "ONSET (UTC)", "ANNOUNCED", "ENDED", "MIN SpO2 %", "ACK BY", "REVIEW", "REVIEWER"}
	if withGateway {
		head = append([]string{"GATEWAY"}, head...)
	}
	t := newTable(w, 0, head...)
	short := func(ms int64) string {
		if ms == 0 {
			return "-"
		}
		return time.UnixMilli(ms).UTC().Format("2006-01-02 15:04:05")
	}
	for _, r := range rows {
		e := r.Episode
		day := time.UnixMilli(e.GetOnsetUnixMs()).UTC().Format("2006-01-02")
		clock := func(ms int64) string { // on the onset's day the time of day is enough
			if ms == 0 {
				return "-"
			}
			if t := time.UnixMilli(ms).UTC(); t.Format("2006-01-02") == day {
				return t.Format("15:04:05")
			}
			return short(ms)
		}
		ended := clock(e.GetEndedUnixMs())
		if e.GetEndedUnixMs() == 0 && e.GetActive() {
			ended = "active"
		} else if e.GetEndedUnixMs() == 0 && e.GetMovedToGateway() != "" {
			ended = "moved to " + e.GetMovedToGateway() // goes on there
		}
		label, who := "-", "-"
		if r.Review != nil {
			label, who = r.Review.GetLabel(), r.Review.GetReviewer()
			if r.Review.GetRevision() > 1 {
				label += fmt.Sprintf(" (rev %d)", r.Review.GetRevision())
			}
		}
		cells := []string{strconv.FormatUint(e.GetEpisodeId(), 10), e.GetDeviceId(), alarms.Label(e.GetCondition()),
			orDash(priorityWord(e.GetPriority())), short(e.GetOnsetUnixMs()), clock(e.GetAnnouncedUnixMs()), ended,
			fmtOpt(e.MinSpo2Pct, 1), orDash(e.GetAcknowledgedBy()), label, who}
		if withGateway {
			cells = append([]string{r.Gateway}, cells...)
		}
		t.row(cells...)
	}
	if len(rows) == 0 {
		fmt.Fprintln(w, "(no episodes)")
	}
	return t.flush()
}
