package main

import (
	"context"
	"encoding/csv"
	"fmt"
	"io"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/review"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func init() {
	register(command{
		name: "review",
		summary: `Record a review of a stored alarm episode on a running gateway (operator role).
Labels: actionable (a real event that needed someone to act), not-actionable
(real, but nothing needed doing), artefact (the reading was wrong: motion, a
loose sensor, poor signal), unsure (cannot tell). The gateway stores who and
when, audits it, and keeps earlier reviews of the episode as older revisions.
The episode id is the one 'pulsefleet episodes' lists for that gateway.`,
		run: runReview,
	})
	register(command{
		name: "reviews",
		summary: `Export every review revision of one or more running gateways as CSV, oldest first per episode.
One row per revision with the episode it reviews; 'pulsefleet episodes
--format csv' gives one row per episode with its newest review. A gateway
that cannot be read leaves the others' reviews written, marked: "#
incomplete:" comment lines after the caution and INCOMPLETE on stderr name
it, and the command exits 3.`,
		run: runReviews,
	})
}

func runReview(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("review", "--gateway ADDR --episode ID --label "+strings.Join(review.Labels, "|")+" [--note TEXT]", s.err)
	cf.register(fs)
	episode := fs.Uint64("episode", 0, "episode id, as 'pulsefleet episodes' lists it for this gateway (required)")
	label := fs.String("label", "", "review label: "+strings.Join(review.Labels, ", ")+" (required)")
	note := fs.String("note", "", "free text, at most 500 characters")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *episode == 0 {
		return usagef("--episode: required, the id of a stored episode (1 or more)")
	}
	if err := review.CheckLabel("--label", *label); err != nil {
		return usageError{err.Error()}
	}
	if err := review.CheckNote("--note", *note); err != nil {
		return usageError{err.Error()}
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	if len(addrs) != 1 {
		return usagef("--gateway: %d addresses, want one (episode ids are per gateway: the one 'pulsefleet episodes' lists with the episode)", len(addrs))
	}
	conn, err := cf.dial(addrs[0])
	if err != nil {
		return err
	}
	defer conn.Close()
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	resp, err := pb.NewFleetServiceClient(conn).ReviewEpisode(cctx, &pb.ReviewEpisodeRequest{EpisodeId: *episode, Label: *label, Note: *note})
	if err != nil {
		return fmt.Errorf("gateway %s: %w", addrs[0], err)
	}
	r := resp.GetReview()
	e := r.GetEpisode()
	fmt.Fprintf(s.out, "episode %d (%s, %s, onset %s) reviewed %s by %s, revision %d\n", r.GetEpisodeId(),
		safeText(r.GetDeviceId()), safeText(alarms.Label(e.GetCondition())), msTime(e.GetOnsetUnixMs()),
		r.GetLabel(), safeText(r.GetReviewer()), r.GetRevision())
	return nil
}

// reviewColumns is the header of the reviews export.
var reviewColumns = []string{"gateway", "episode_id", "revision", "label", "reviewer", "reviewed", "note",
	"device", "condition", "priority", "onset", "announced", "ended", "min_spo2_pct"}

func runReviews(ctx context.Context, args []string, s stdio) error {
	var cf clientFlags
	fs := newFlagSet("reviews", "--gateway ADDR[,ADDR...] [--device ID]", s.err)
	cf.register(fs)
	device := fs.String("device", "", "only this device")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	addrs, err := cf.addrs()
	if err != nil {
		return err
	}
	var all []gatewayReview
	var failed []gatewayError
	for _, a := range addrs {
		rs, err := gatewayReviews(ctx, &cf, a, &pb.ListReviewsRequest{DeviceId: *device, History: true})
		if err != nil {
			failed = append(failed, gatewayError{a, err})
			continue
		}
		for _, r := range rs {
			all = append(all, gatewayReview{a, r})
		}
	}
	var only []string
	if *device != "" {
		only = []string{*device}
	}
	gaps := findGaps(ctx, &cf, reachableOf(addrs, failed), failed, only)
	if err := writeReviewsCSV(s.out, all, gaps.notes("reviews", 1000)); err != nil {
		return err
	}
	printGaps(s.err, "reviews", gaps, "reviews")
	return incomplete("reviews", len(addrs), failed)
}

type gatewayReview struct {
	Gateway string
	Review  *pb.EpisodeReview
}

func gatewayReviews(ctx context.Context, cf *clientFlags, addr string, req *pb.ListReviewsRequest) ([]*pb.EpisodeReview, error) {
	conn, err := cf.dial(addr)
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	cctx, cancel := context.WithTimeout(cf.ctx(ctx), 30*time.Second)
	defer cancel()
	resp, err := pb.NewFleetServiceClient(conn).ListReviews(cctx, req)
	if err != nil {
		return nil, err
	}
	return resp.GetReviews(), nil
}

// writeReviewsCSV writes the reviews export; notes (a merged answer's
// gaps) become "# incomplete:" comment lines after the caution.
func writeReviewsCSV(w io.Writer, rs []gatewayReview, notes []string) error {
	if err := writeCSVHead(w, notes); err != nil {
		return err
	}
	cw := csv.NewWriter(w)
	if err := cw.Write(reviewColumns); err != nil {
		return err
	}
	for _, gr := range rs {
		r, e := gr.Review, gr.Review.GetEpisode()
		row := []string{gr.Gateway, strconv.FormatUint(r.GetEpisodeId(), 10), strconv.FormatUint(uint64(r.GetRevision()), 10),
			r.GetLabel(), r.GetReviewer(), msTime(r.GetReviewedUnixMs()), r.GetNote(),
			r.GetDeviceId(), e.GetCondition(), priorityWord(e.GetPriority()), msTime(e.GetOnsetUnixMs()),
			msTime(e.GetAnnouncedUnixMs()), msTime(e.GetEndedUnixMs()), estCell(e.MinSpo2Pct, 1)}
		if err := cw.Write(row); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}
