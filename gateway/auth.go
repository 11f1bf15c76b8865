package gateway

import (
	"context"

	"google.golang.org/grpc/peer"
)

// actorFrom names who is calling, for the audit log.
func actorFrom(ctx context.Context) string {
	if v, ok := ctx.Value(actorKey{}).(string); ok && v != "" {
		return v
	}
	return "anonymous"
}

type actorKey struct{}

// remoteFrom returns the peer address of a call.
func remoteFrom(ctx context.Context) string {
	if p, ok := peer.FromContext(ctx); ok {
		return p.Addr.String()
	}
	return ""
}
