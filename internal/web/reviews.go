package web

import (
	"context"
	"net/http"
	"strconv"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/review"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The review control's JSON (webui/review.js), the API's messages through
// protojson like the rest of the page's JSON (json.go): reading a device's newest
// reviews needs the viewer role; reviewing an episode needs the operator
// role and, with a session, its CSRF token, like the page's other writes.
// Both go through the gateway's FleetService calls (ListReviews,
// ReviewEpisode), so the checks and the audit entry are the gRPC path's.

// reviewRoutes mounts the review JSON on mux.
func (s *Server) reviewRoutes(mux *http.ServeMux) {
	mux.Handle("GET /api/device/{id}/reviews", s.webHandler(auth.RoleViewer, s.webReviews))
	mux.Handle("POST /api/episode/{episode}/review", s.webHandler(auth.RoleOperator, s.webReview))
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
		Labels  []webLabel                          `json:"labels"`
		Reviews map[string]Proto[*pb.EpisodeReview] `json:"reviews"` // by episode id
	}{Reviews: map[string]Proto[*pb.EpisodeReview]{}}
	for _, l := range review.Labels {
		out.Labels = append(out.Labels, webLabel{l, review.Meaning[l]})
	}
	for _, rv := range resp.GetReviews() {
		rv.Episode = nil // the page has the episode already
		out.Reviews[strconv.FormatUint(rv.GetEpisodeId(), 10)] = P(rv)
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
	resp.Review.Episode = nil
	return P(resp), nil
}
