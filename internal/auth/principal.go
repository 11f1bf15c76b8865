package auth

import (
	"context"

	"google.golang.org/grpc/peer"
)

// Principal is who makes a call.
type Principal struct {
	Kind    string // "device", "operator" or "anonymous" (open gateway)
	Subject string // device id or operator name
	Role    Role
	TokenID string
}

// Actor names the principal in the audit log.
func (p Principal) Actor() string {
	switch p.Kind {
	case "device":
		return "device:" + p.Subject
	case "operator":
		return p.Subject
	}
	return "anonymous"
}

// Anonymous is the caller on an open gateway (no credential issued, a
// loopback peer): it has every role.
var Anonymous = Principal{Kind: "anonymous", Role: RoleAdmin}

type principalKey struct{}

type actorKey struct{}

// remoteKey carries the client address of a web request.
type remoteKey struct{}

// PrincipalFrom returns the caller set by the guards (ok false when none).
func PrincipalFrom(ctx context.Context) (Principal, bool) {
	p, ok := ctx.Value(principalKey{}).(Principal)
	return p, ok
}

// WithPrincipal returns ctx carrying p (and its actor name).
func WithPrincipal(ctx context.Context, p Principal) context.Context {
	ctx = context.WithValue(ctx, principalKey{}, p)
	return context.WithValue(ctx, actorKey{}, p.Actor())
}

// WithActor returns ctx carrying an actor name for the audit log without a
// principal (the web code names anonymous callers this way).
func WithActor(ctx context.Context, actor string) context.Context {
	return context.WithValue(ctx, actorKey{}, actor)
}

// ActorFrom names who is calling, for the audit log.
func ActorFrom(ctx context.Context) string {
	if v, ok := ctx.Value(actorKey{}).(string); ok && v != "" {
		return v
	}
	return "anonymous"
}

// WithRemote returns ctx carrying the client address of a web request.
func WithRemote(ctx context.Context, addr string) context.Context {
	return context.WithValue(ctx, remoteKey{}, addr)
}

// RemoteFrom returns the client address of a call: the web client's, or
// the gRPC peer's.
func RemoteFrom(ctx context.Context) string {
	if a, ok := ctx.Value(remoteKey{}).(string); ok && a != "" {
		return a
	}
	if p, ok := peer.FromContext(ctx); ok {
		return p.Addr.String()
	}
	return ""
}
