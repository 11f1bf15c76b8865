package gateway

import (
	"context"
	"crypto/rand"
	"encoding/base64"
	"encoding/hex"
	"errors"
	"fmt"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/store"
)

// TokenSpec names the subject of a new credential: exactly one of Device or
// Operator; Role for operators only.
type TokenSpec struct {
	Device   string // device id (1..64 of A-Z a-z 0-9 . _ -)
	Operator string // operator name (same characters)
	Role     Role   // viewer, operator or admin; RoleNone for a device
}

func (s TokenSpec) validate() error {
	switch {
	case (s.Device == "") == (s.Operator == ""):
		return errors.New("device, operator: give exactly one")
	case s.Device != "":
		if err := validID("device", s.Device); err != nil {
			return err
		}
		if s.Role != RoleNone {
			return fmt.Errorf("role: %s, but a device credential has no role (it may only stream as its device)", s.Role)
		}
	default:
		if err := validID("operator", s.Operator); err != nil {
			return err
		}
		if s.Role < RoleViewer || s.Role > RoleAdmin {
			return errors.New("role: missing, want viewer, operator or admin")
		}
	}
	return nil
}

// newSecret makes a bearer token: "pf1_" + a 12-hex-digit public id + "_" +
// 256 random bits (base64url). Only its SHA-256 is stored.
func newSecret() (secret, id string) {
	var idb [6]byte
	var sb [32]byte
	_, _ = rand.Read(idb[:]) // crypto/rand.Read never fails (Go 1.24+)
	_, _ = rand.Read(sb[:])
	id = hex.EncodeToString(idb[:])
	return "pf1_" + id + "_" + base64.RawURLEncoding.EncodeToString(sb[:]), id
}

// IssueToken creates a credential in db and returns its secret, which is
// shown this once. by and remote name the issuer for the audit log. The
// store must not be held by a running gateway (use AdminService.IssueToken
// then).
func IssueToken(db *store.DB, spec TokenSpec, by, remote string, now time.Time) (string, store.Token, error) {
	if err := spec.validate(); err != nil {
		return "", store.Token{}, err
	}
	secret, id := newSecret()
	t := store.Token{Hash: hashSecret(secret), ID: id, CreatedMS: now.UnixMilli(), IssuedBy: by}
	detail := ""
	if spec.Device != "" {
		t.Kind, t.Subject = "device", spec.Device
		detail = "device credential " + id + " for " + spec.Device
	} else {
		t.Kind, t.Subject, t.Role = "operator", spec.Operator, spec.Role.String()
		detail = "operator credential " + id + " for " + spec.Operator + " with role " + t.Role
	}
	audit := &store.AuditEntry{TimeMS: t.CreatedMS, Actor: by, Action: "token.issue", Device: spec.Device, Detail: detail, Remote: remote}
	if err := db.PutToken(t, audit); err != nil {
		return "", store.Token{}, fmt.Errorf("issue token: %w", err)
	}
	return secret, t, nil
}

// RevokeToken revokes the credential with public id in db at once.
func RevokeToken(db *store.DB, id, by, remote string, now time.Time) (store.Token, error) {
	if id == "" || len(id) > 64 {
		return store.Token{}, fmt.Errorf("token id: %q, want the id shown by `token list`", id)
	}
	ms := now.UnixMilli()
	var t store.Token
	t, err := db.RevokeToken(id, ms, &store.AuditEntry{TimeMS: ms, Actor: by, Action: "token.revoke", Detail: "credential " + id, Remote: remote})
	if err != nil {
		return store.Token{}, err
	}
	return t, nil
}

// TokenProto maps a stored credential to the API's (never with its secret).
func TokenProto(t store.Token) *pb.Token {
	out := &pb.Token{TokenId: t.ID, Kind: t.Kind, Subject: t.Subject, CreatedUnixMs: t.CreatedMS, RevokedUnixMs: t.RevokedMS, IssuedBy: t.IssuedBy}
	if r, err := ParseRole(t.Role); err == nil {
		out.Role = RoleProto(r)
	}
	return out
}

// RoleProto maps a role to the API's.
func RoleProto(r Role) pb.Role {
	switch r {
	case RoleViewer:
		return pb.Role_ROLE_VIEWER
	case RoleOperator:
		return pb.Role_ROLE_OPERATOR
	case RoleAdmin:
		return pb.Role_ROLE_ADMIN
	}
	return pb.Role_ROLE_UNSPECIFIED
}

// RoleFromProto maps the API's role.
func RoleFromProto(r pb.Role) Role {
	switch r {
	case pb.Role_ROLE_VIEWER:
		return RoleViewer
	case pb.Role_ROLE_OPERATOR:
		return RoleOperator
	case pb.Role_ROLE_ADMIN:
		return RoleAdmin
	}
	return RoleNone
}

// IssueToken implements AdminService.
func (g *Gateway) IssueToken(ctx context.Context, req *pb.IssueTokenRequest) (*pb.IssueTokenResponse, error) {
	spec := TokenSpec{Device: req.GetDeviceId(), Operator: req.GetOperator(), Role: RoleFromProto(req.GetRole())}
	if req.GetRole() != pb.Role_ROLE_UNSPECIFIED && spec.Role == RoleNone {
		return nil, status.Errorf(codes.InvalidArgument, "role: %v, want ROLE_VIEWER, ROLE_OPERATOR or ROLE_ADMIN", req.GetRole())
	}
	if err := spec.validate(); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	secret, t, err := IssueToken(g.db, spec, actorFrom(ctx), remoteFrom(ctx), g.opt.Now())
	if err != nil {
		return nil, status.Errorf(codes.Unavailable, "%v", err)
	}
	g.auth.mu.Lock()
	g.auth.tokens[t.Hash] = t
	g.auth.mu.Unlock()
	g.log.Info("credential issued", "id", t.ID, "kind", t.Kind, "subject", t.Subject, "role", t.Role, "by", t.IssuedBy)
	return &pb.IssueTokenResponse{Secret: secret, Token: TokenProto(t)}, nil
}

// ListTokens implements AdminService.
func (g *Gateway) ListTokens(ctx context.Context, _ *pb.ListTokensRequest) (*pb.ListTokensResponse, error) {
	ts, err := g.db.Tokens()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.ListTokensResponse{}
	for _, t := range ts {
		out.Tokens = append(out.Tokens, TokenProto(t))
	}
	return out, nil
}

// RevokeToken implements AdminService. Every open gRPC stream made with the
// credential ends at once (a device's stream, an operator's watch); web
// sessions made with it end at their next request.
func (g *Gateway) RevokeToken(ctx context.Context, req *pb.RevokeTokenRequest) (*pb.RevokeTokenResponse, error) {
	t, err := RevokeToken(g.db, req.GetTokenId(), actorFrom(ctx), remoteFrom(ctx), g.opt.Now())
	if errors.Is(err, store.ErrNotFound) {
		return nil, status.Errorf(codes.NotFound, "token_id: %q is not a credential of this gateway", req.GetTokenId())
	}
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "%v", err)
	}
	g.auth.mu.Lock()
	g.auth.tokens[t.Hash] = t
	g.auth.mu.Unlock()
	g.auth.endStreams(t.ID)
	g.log.Info("credential revoked", "id", t.ID, "kind", t.Kind, "subject", t.Subject, "by", actorFrom(ctx))
	return &pb.RevokeTokenResponse{Token: TokenProto(t)}, nil
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
		out.Entries = append(out.Entries, AuditProto(e))
	}
	return out, nil
}

// AuditProto maps a stored audit entry to the API's.
func AuditProto(e store.AuditEntry) *pb.AuditEntry {
	return &pb.AuditEntry{AuditId: e.ID, TimeUnixMs: e.TimeMS, Actor: e.Actor, Action: e.Action, DeviceId: e.Device, Detail: e.Detail, Remote: e.Remote}
}
