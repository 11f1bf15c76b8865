package auth

import (
	"context"
	"errors"
	"fmt"
	"net"
	"runtime/debug"
	"strings"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"
)

// ServerOptions returns the gRPC server options that install the guards:
// every call is authenticated, checked against its method's role, and
// recovered from a panic.
func (a *Authenticator) ServerOptions() []grpc.ServerOption {
	return []grpc.ServerOption{grpc.ChainUnaryInterceptor(a.unaryGuard), grpc.ChainStreamInterceptor(a.streamGuard)}
}

// bearerFromMD reads "authorization: Bearer TOKEN" from incoming metadata.
func bearerFromMD(ctx context.Context) string {
	md, _ := metadata.FromIncomingContext(ctx)
	for _, v := range md.Get("authorization") {
		if tok, ok := CutBearer(v); ok {
			return tok
		}
	}
	return ""
}

// exempt: the standard health check and reflection answer anyone (they
// reveal no data), so load balancers and grpcurl work before logging in.
func exempt(method string) bool {
	return strings.HasPrefix(method, "/grpc.health.v1.Health/") ||
		strings.HasPrefix(method, "/grpc.reflection.v1.ServerReflection/") ||
		strings.HasPrefix(method, "/grpc.reflection.v1alpha.ServerReflection/")
}

// authorizeCall authenticates a gRPC call and checks its method's role.
func (a *Authenticator) authorizeCall(ctx context.Context, method string) (context.Context, error) {
	if exempt(method) {
		return ctx, nil
	}
	var remote net.Addr
	if p, ok := peer.FromContext(ctx); ok {
		remote = p.Addr
	}
	tok := bearerFromMD(ctx)
	var p Principal
	if tok == "" && a.Open(remote) {
		p = Anonymous
	} else {
		var err error
		p, err = a.Authenticate(tok)
		if err != nil {
			a.Failed(ctx, RemoteFrom(ctx), "auth.failure", p, "", fmt.Sprintf("%s: %v", method, err))
			return ctx, status.Errorf(codes.Unauthenticated, "%v: send \"authorization: Bearer TOKEN\" with a valid token (see `pulsefleet token issue`)", err)
		}
	}
	need, ok := methodRoles[method]
	if !ok {
		need = RoleAdmin
	}
	switch {
	case need == needDevice:
		if p.Kind == "device" || p.Role == RoleAdmin {
			break
		}
		a.Failed(ctx, RemoteFrom(ctx), "auth.denied", p, "", fmt.Sprintf("%s: a %s credential may not stream; a device or admin one may", method, p.Role))
		return ctx, status.Errorf(codes.PermissionDenied, "%s: streaming needs a device credential (or admin); %s has role %s", method, p.Actor(), p.Role)
	case p.Kind == "device":
		a.Failed(ctx, RemoteFrom(ctx), "auth.denied", p, p.Subject, method+": device credentials may only stream")
		return ctx, status.Errorf(codes.PermissionDenied, "%s: device credentials may only stream (IngestService.Connect)", method)
	case p.Role < need:
		a.Failed(ctx, RemoteFrom(ctx), "auth.denied", p, "", fmt.Sprintf("%s: needs role %s, has %s", method, need, p.Role))
		return ctx, status.Errorf(codes.PermissionDenied, "%s: needs role %s; %s has role %s", method, need, p.Actor(), p.Role)
	}
	return WithPrincipal(ctx, p), nil
}

// AuthorizeDevice checks that the stream's credential may speak for
// deviceID; the error is a gRPC status.
func (a *Authenticator) AuthorizeDevice(ctx context.Context, deviceID string) error {
	p, ok := PrincipalFrom(ctx)
	if !ok {
		// Not through the guards (a test calling Connect directly): only an
		// open gateway lets it in.
		if a.Closed() {
			return status.Error(codes.Unauthenticated, "no credential")
		}
		return nil
	}
	if p.Kind == "device" && p.Subject != deviceID {
		a.Failed(ctx, RemoteFrom(ctx), "auth.denied", p, deviceID, fmt.Sprintf("credential %s of device %s may not stream as %s", p.TokenID, p.Subject, deviceID))
		return status.Errorf(codes.PermissionDenied, "introduction.device_id: %q, but the credential belongs to device %q: a device may stream only as itself", deviceID, p.Subject)
	}
	return nil
}

// guardedStream carries the authenticated context into a streaming handler.
type guardedStream struct {
	grpc.ServerStream
	ctx context.Context
}

func (s *guardedStream) Context() context.Context { return s.ctx }

func (a *Authenticator) unaryGuard(ctx context.Context, req any, info *grpc.UnaryServerInfo, h grpc.UnaryHandler) (resp any, err error) {
	defer a.recoverCall(info.FullMethod, &err)
	ctx, err = a.authorizeCall(ctx, info.FullMethod)
	if err != nil {
		return nil, err
	}
	return h(ctx, req)
}

func (a *Authenticator) streamGuard(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) (err error) {
	defer a.recoverCall(info.FullMethod, &err)
	ctx, err := a.authorizeCall(ss.Context(), info.FullMethod)
	if err != nil {
		return err
	}
	if p, ok := PrincipalFrom(ctx); ok && p.TokenID != "" {
		// Streams made with a credential end when it is revoked; a device
		// credential holds at most a few at once (one per device, a few
		// overlapping while one replaces another), so idle streams cannot
		// pile up in the gateway's memory.
		var release func()
		ctx, release, ok = a.OpenStream(ctx, p)
		if !ok {
			a.Failed(ctx, RemoteFrom(ctx), "auth.denied", p, p.Subject, fmt.Sprintf("%s: more than %d open streams with credential %s", info.FullMethod, MaxDeviceStreams, p.TokenID))
			return status.Errorf(codes.ResourceExhausted, "device %s already has %d open streams; close them (a new stream replaces the device's open one)", p.Subject, MaxDeviceStreams)
		}
		defer release()
	}
	err = h(srv, &guardedStream{ServerStream: ss, ctx: ctx})
	if errors.Is(context.Cause(ctx), ErrRevoked) {
		// Whatever the handler saw (a cancelled context, a broken send),
		// the stream ended because its credential was revoked.
		return status.Errorf(codes.Unauthenticated, "credential revoked; the stream ended (%s)", info.FullMethod)
	}
	return err
}

// recoverCall turns a panic in an API call into INTERNAL: no input may take
// the gateway down.
func (a *Authenticator) recoverCall(method string, err *error) {
	if p := recover(); p != nil {
		a.panics.Inc()
		a.cfg.Log.Error("panic in API call", "method", method, "panic", p, "stack", string(debug.Stack()))
		*err = status.Errorf(codes.Internal, "internal error in %s (recovered; the gateway goes on)", method)
	}
}
