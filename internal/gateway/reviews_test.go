package gateway

import (
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Reviews through gRPC while the gateway runs: an operator reviews, a
// viewer may read but not review, a change keeps the earlier revision,
// every stored review is audited under the credential's name, and bad
// input is refused naming the field and the bound.
func TestReviewEpisodeRoundTrip(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	nurse := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "nurse-ilse", Role: pb.Role_ROLE_OPERATOR})
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-lu", Role: pb.Role_ROLE_VIEWER})
	d := h.openAs(t, admin)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-r")}})
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second).UnixMilli()
	for s := uint64(1); s <= 8; s++ { // 85 % from the second sample: announced after the 3 s delay
		v := 85.0
		if s == 1 {
			v = 96
		}
		d.send(summary(s, t0+int64(s-1)*1000, v))
	}
	d.waitAck(8)
	var ep *pb.Episode
	waitUntil(t, func() bool {
		r, err := h.fleet().ListEpisodes(bearer(viewer), &pb.ListEpisodesRequest{DeviceId: "bed-r"})
		if err == nil && len(r.GetEpisodes()) == 1 && r.GetEpisodes()[0].GetEpisodeId() != 0 {
			ep = r.GetEpisodes()[0]
			return true
		}
		return false
	}, "a stored episode")

	_, err := h.fleet().ReviewEpisode(bearer(viewer), &pb.ReviewEpisodeRequest{EpisodeId: ep.GetEpisodeId(), Label: "actionable"})
	if status.Code(err) != codes.PermissionDenied {
		t.Errorf("viewer reviews: %v, want PermissionDenied", err)
	}
	for _, c := range []struct {
		req  *pb.ReviewEpisodeRequest
		code codes.Code
		want string
	}{
		{&pb.ReviewEpisodeRequest{EpisodeId: ep.GetEpisodeId(), Label: "false-alarm"}, codes.InvalidArgument, `label: "false-alarm", want one of actionable, not-actionable, artefact, unsure`},
		{&pb.ReviewEpisodeRequest{EpisodeId: ep.GetEpisodeId(), Label: "unsure", Note: strings.Repeat("x", 501)}, codes.InvalidArgument, "note: 501 characters, want at most 500"},
		{&pb.ReviewEpisodeRequest{EpisodeId: 0, Label: "unsure"}, codes.InvalidArgument, "episode_id: 0"},
		{&pb.ReviewEpisodeRequest{EpisodeId: 4242, Label: "unsure"}, codes.NotFound, "episode_id: 4242 is not stored"},
	} {
		_, err := h.fleet().ReviewEpisode(bearer(nurse), c.req)
		if status.Code(err) != c.code || !strings.Contains(status.Convert(err).Message(), c.want) {
			t.Errorf("review %v: %v, want %v containing %q", c.req, err, c.code, c.want)
		}
	}
	r1, err := h.fleet().ReviewEpisode(bearer(nurse), &pb.ReviewEpisodeRequest{EpisodeId: ep.GetEpisodeId(), Label: "artefact", Note: "probe slipped"})
	if err != nil {
		t.Fatal(err)
	}
	if g := r1.GetReview(); g.GetRevision() != 1 || g.GetReviewer() != "nurse-ilse" || g.GetDeviceId() != "bed-r" || g.GetEpisode().GetCondition() != "spo2_low" {
		t.Errorf("first review %v, want revision 1 by nurse-ilse of a spo2_low episode of bed-r", g)
	}
	if _, err := h.fleet().ReviewEpisode(bearer(admin), &pb.ReviewEpisodeRequest{EpisodeId: ep.GetEpisodeId(), Label: "actionable"}); err != nil {
		t.Fatal(err)
	}
	latest, err := h.fleet().ListReviews(bearer(viewer), &pb.ListReviewsRequest{DeviceId: "bed-r"})
	if err != nil {
		t.Fatal(err)
	}
	if rs := latest.GetReviews(); len(rs) != 1 || rs[0].GetLabel() != "actionable" || rs[0].GetRevision() != 2 || rs[0].GetReviewer() != "admin-ro" {
		t.Errorf("newest reviews %v, want revision 2 actionable by admin-ro", rs)
	}
	hist, _ := h.fleet().ListReviews(bearer(viewer), &pb.ListReviewsRequest{EpisodeIds: []uint64{ep.GetEpisodeId()}, History: true})
	if rs := hist.GetReviews(); len(rs) != 2 || rs[0].GetLabel() != "artefact" || rs[0].GetNote() != "probe slipped" || rs[1].GetLabel() != "actionable" {
		t.Errorf("history %v, want artefact (with its note) then actionable", rs)
	}
	au, _ := h.db.Audit(0, "episode.review", 0)
	if len(au) != 2 || au[1].Actor != "nurse-ilse" || au[1].Device != "bed-r" || !strings.Contains(au[1].Detail, "artefact; note: probe slipped") || au[0].Actor != "admin-ro" {
		t.Errorf("audit %+v, want two episode.review entries (newest first: admin-ro, then nurse-ilse with label and note)", au)
	}
	// Kept across a restart.
	h.restart()
	rs, err := h.db.Reviews(store.ReviewFilter{History: true})
	if err != nil || len(rs) != 2 {
		t.Errorf("after restart: %d reviews (%v), want 2", len(rs), err)
	}
}
