package gateway

import (
	"context"
	"errors"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// IssueToken implements AdminService.
func (g *Gateway) IssueToken(ctx context.Context, req *pb.IssueTokenRequest) (*pb.IssueTokenResponse, error) {
	spec := auth.TokenSpec{Device: req.GetDeviceId(), Operator: req.GetOperator(), Role: auth.RoleFromProto(req.GetRole())}
	if req.GetRole() != pb.Role_ROLE_UNSPECIFIED && spec.Role == auth.RoleNone {
		return nil, status.Errorf(codes.InvalidArgument, "role: %v, want ROLE_VIEWER, ROLE_OPERATOR or ROLE_ADMIN", req.GetRole())
	}
	if err := spec.Validate(); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	if g.opt.ControlPlane != nil {
		return g.issueShared(ctx, spec)
	}
	secret, t, err := auth.IssueToken(g.db, spec, auth.ActorFrom(ctx), auth.RemoteFrom(ctx), g.opt.Now())
	if err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	g.auth.Put(t)
	g.log.Info("credential issued", "id", t.ID, "kind", t.Kind, "subject", t.Subject, "role", t.Role, "by", t.IssuedBy)
	return &pb.IssueTokenResponse{Secret: secret, Token: auth.TokenProto(t)}, nil
}

// ListTokens implements AdminService.
func (g *Gateway) ListTokens(ctx context.Context, _ *pb.ListTokensRequest) (*pb.ListTokensResponse, error) {
	ts, err := g.db.Tokens()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.ListTokensResponse{}
	for _, t := range ts {
		out.Tokens = append(out.Tokens, auth.TokenProto(t))
	}
	return out, nil
}

// RevokeToken implements AdminService. Every open gRPC stream made with the
// credential ends at once (a device's stream, an operator's watch); web
// sessions made with it end at their next request.
func (g *Gateway) RevokeToken(ctx context.Context, req *pb.RevokeTokenRequest) (*pb.RevokeTokenResponse, error) {
	if g.opt.ControlPlane != nil {
		return g.revokeShared(ctx, req.GetTokenId())
	}
	t, err := auth.RevokeToken(g.db, req.GetTokenId(), auth.ActorFrom(ctx), auth.RemoteFrom(ctx), g.opt.Now())
	if errors.Is(err, store.ErrNotFound) {
		return nil, status.Errorf(codes.NotFound, "token_id: %q is not a credential of this gateway", req.GetTokenId())
	}
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "%v", err)
	}
	g.auth.Put(t) // ends the credential's open streams
	g.log.Info("credential revoked", "id", t.ID, "kind", t.Kind, "subject", t.Subject, "by", auth.ActorFrom(ctx))
	return &pb.RevokeTokenResponse{Token: auth.TokenProto(t)}, nil
}

// ListAudit implements AdminService.
func (g *Gateway) ListAudit(ctx context.Context, req *pb.ListAuditRequest) (*pb.ListAuditResponse, error) {
	limit := int(req.GetLimit())
	if limit == 0 {
		limit = 1000
	}
	if limit > 10000 {
		return nil, status.Errorf(codes.InvalidArgument, "limit: %d, want 1..10000 (0 = 1000)", limit)
	}
	if n := len(req.GetActionPrefix()); n > 64 {
		return nil, status.Errorf(codes.InvalidArgument, "action_prefix: %d characters, want at most 64", n)
	}
	es, err := g.db.Audit(req.GetFromUnixMs(), req.GetActionPrefix(), limit)
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.ListAuditResponse{}
	for _, e := range es {
		out.Entries = append(out.Entries, auth.AuditProto(e))
	}
	return out, nil
}
