package web

import (
	"context"
	"net/http"
	"strconv"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/review"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The review control's JSON (webui/review.js): reading a device's newest
// reviews needs the viewer role; reviewing an episode needs the operator
// role and, with a session, its CSRF token, like the page's other writes.
// Both go through the gateway's FleetService calls (ListReviews,
// ReviewEpisode), so the checks and the audit entry are the gRPC path's.

// reviewRoutes mounts the review JSON on mux.
func (s *Server) reviewRoutes(mux *http.ServeMux) {
	mux.Handle("GET /api/device/{id}/reviews", s.webHandler(auth.RoleViewer, s.webReviews))
	mux.Handle("POST /api/episode/{episode}/review", s.webHandler(auth.RoleOperator, s.webReview))
}

type webReview struct {
	EpisodeID  string `json:"episode_id"` // a string: 64-bit ids do not fit a JS number
	Label      string `json:"label"`
	Note       string `json:"note,omitempty"`
	Reviewer   string `json:"reviewer"`
	ReviewedMS int64  `json:"reviewed_ms"`
	Revision   uint32 `json:"revision"`
}

func webReviewOf(r *pb.EpisodeReview) webReview {
	return webReview{EpisodeID: strconv.FormatUint(r.GetEpisodeId(), 10), Label: r.GetLabel(), Note: r.GetNote(),
		Reviewer: r.GetReviewer(), ReviewedMS: r.GetReviewedUnixMs(), Revision: r.GetRevision()}
}

type webLabel struct {
	Label   string `json:"label"`
	Meaning string `json:"meaning"`
}

// webReviews answers the labels (with their meanings) and the newest review
// of each reviewed episode of the device, by episode id.
func (s *Server) webReviews(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	resp, err := s.fleet.ListReviews(ctx, &pb.ListReviewsRequest{DeviceId: r.PathValue("id")})
	if err != nil {
		return nil, err
	}
	out := struct {
		Labels  []webLabel           `json:"labels"`
		Reviews map[string]webReview `json:"reviews"`
	}{Reviews: map[string]webReview{}}
	for _, l := range review.Labels {
		out.Labels = append(out.Labels, webLabel{l, review.Meaning[l]})
	}
	for _, rv := range resp.GetReviews() {
		out.Reviews[strconv.FormatUint(rv.GetEpisodeId(), 10)] = webReviewOf(rv)
	}
	return out, nil
}

func (s *Server) webReview(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	if err := checkSameOrigin(r); err != nil {
		return nil, err
	}
	id, err := strconv.ParseUint(r.PathValue("episode"), 10, 64)
	if err != nil {
		return nil, badRequest("episode: %q, want a decimal episode id", r.PathValue("episode"))
	}
	var req struct {
		Label string `json:"label"`
		Note  string `json:"note"`
	}
	if err := readJSON(r, &req); err != nil {
		return nil, err
	}
	resp, err := s.fleet.ReviewEpisode(ctx, &pb.ReviewEpisodeRequest{EpisodeId: id, Label: req.Label, Note: req.Note})
	if err != nil {
		return nil, err
	}
	return struct {
		Review webReview `json:"review"`
	}{webReviewOf(resp.GetReview())}, nil
}
