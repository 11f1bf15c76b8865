package gateway

import (
	"context"
	"errors"
	"fmt"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	"github.com/pulsefleet/pulsefleet/internal/review"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// maxReviewEpisodes bounds ListReviewsRequest.episode_ids.
const maxReviewEpisodes = 10_000

// ReviewEpisode implements FleetService: the review and its audit entry
// ("episode.review") are stored in one transaction; an earlier review of
// the episode stays as an older revision.
func (g *Gateway) ReviewEpisode(ctx context.Context, req *pb.ReviewEpisodeRequest) (*pb.ReviewEpisodeResponse, error) {
	if req.GetEpisodeId() == 0 {
		return nil, status.Error(codes.InvalidArgument, "episode_id: 0, want the id of a stored episode (1 or more)")
	}
	if err := review.CheckLabel("label", req.GetLabel()); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	if err := review.CheckNote("note", req.GetNote()); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	who, remote, now := auth.ActorFrom(ctx), auth.RemoteFrom(ctx), g.nowMS()
	detail := fmt.Sprintf("episode %d: %s", req.GetEpisodeId(), req.GetLabel())
	if req.GetNote() != "" {
		detail += "; note: " + req.GetNote()
	}
	ep, err := g.db.Episode(req.GetEpisodeId())
	if err != nil {
		return nil, reviewStoreError(req.GetEpisodeId(), err)
	}
	audit := &store.AuditEntry{TimeMS: now, Actor: who, Action: "episode.review", Device: ep.Device, Detail: detail, Remote: remote}
	r, err := g.db.PutReview(store.Review{EpisodeID: req.GetEpisodeId(), Label: req.GetLabel(), Note: req.GetNote(),
		Reviewer: who, TimeMS: now, Remote: remote}, audit)
	if err != nil {
		return nil, reviewStoreError(req.GetEpisodeId(), err)
	}
	return &pb.ReviewEpisodeResponse{Review: reviewProto(&r, &ep)}, nil
}

func reviewStoreError(id uint64, err error) error {
	if errors.Is(err, store.ErrNotFound) {
		return status.Errorf(codes.NotFound, "episode_id: %d is not stored by this gateway", id)
	}
	return status.Errorf(codes.Unavailable, "store: %v", err)
}

// ListReviews implements FleetService: reviews ordered by episode id, each
// with its episode as stored now.
func (g *Gateway) ListReviews(ctx context.Context, req *pb.ListReviewsRequest) (*pb.ListReviewsResponse, error) {
	if n := len(req.GetEpisodeIds()); n > maxReviewEpisodes {
		return nil, status.Errorf(codes.InvalidArgument, "episode_ids: %d, want at most %d", n, maxReviewEpisodes)
	}
	if req.GetDeviceId() != "" {
		if err := validID("device_id", req.GetDeviceId()); err != nil {
			return nil, status.Error(codes.InvalidArgument, err.Error())
		}
	}
	rs, err := g.db.Reviews(store.ReviewFilter{Device: req.GetDeviceId(), Episodes: req.GetEpisodeIds(), History: req.GetHistory()})
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.ListReviewsResponse{}
	eps := map[uint64]*store.Episode{}
	for i := range rs {
		ep, ok := eps[rs[i].EpisodeID]
		if !ok {
			e, err := g.db.Episode(rs[i].EpisodeID)
			switch {
			case err == nil:
				ep = &e
			case !errors.Is(err, store.ErrNotFound):
				return nil, status.Errorf(codes.Internal, "%v", err)
			}
			eps[rs[i].EpisodeID] = ep
		}
		out.Reviews = append(out.Reviews, reviewProto(&rs[i], ep))
	}
	return out, nil
}

func reviewProto(r *store.Review, ep *store.Episode) *pb.EpisodeReview {
	out := &pb.EpisodeReview{EpisodeId: r.EpisodeID, DeviceId: r.Device, Label: r.Label, Note: r.Note,
		Reviewer: r.Reviewer, ReviewedUnixMs: r.TimeMS, Revision: r.Revision}
	if ep != nil {
		out.Episode = ingest.EpisodeProto(ep)
	}
	return out
}
