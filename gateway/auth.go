package gateway

import (
	"context"
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/base64"
	"encoding/hex"
	"errors"
	"fmt"
	"github.com/pulsefleet/pulsefleet/caution"
	"net"
	"net/http"
	"runtime/debug"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/store"
)

// Authentication and authorization.
//
// Credentials are bearer tokens (see IssueToken): a device token lets one
// device stream as itself; an operator token carries a role. Roles are
// ordered, each including the ones below it:
//
//	viewer    read devices, trends, episodes, quality, profiles, calibrations, the audit log
//	operator  also acknowledge and pause alarms
//	admin     also change alarm profiles and calibrations, manage credentials,
//	          and stream as any device (for simulators and load tests)
//
// Enforcement: while any credential exists in the store (revoked ones
// count), or SecurityOptions.RequireTokens is set, every call needs a valid
// token except the standard health check and reflection. While none exists
// and RequireTokens is off, the gateway is open for development: calls from
// loopback (or in-process) peers need no token and act as "anonymous" with
// every role; calls from any other address are refused. A token that is
// presented is always checked, open or not.
//
// Failures answer UNAUTHENTICATED (no, unknown or revoked credential) or
// PERMISSION_DENIED (valid credential, not allowed) and are written to the
// audit log as auth.failure and auth.denied, at most
// SecurityOptions.AuthAuditPerMinute per remote host per minute and ten
// times that over all hosts together; the next entry written for a host
// counts what was left out (pulsefleet_auth_audit_suppressed_total counts
// every one). Secrets are never
// logged or stored: only their SHA-256.

// Role of an operator credential, ordered by what it allows.
type Role uint8

// Roles. RoleNone is a device credential's (it may only stream).
const (
	RoleNone Role = iota
	RoleViewer
	RoleOperator
	RoleAdmin
)

func (r Role) String() string {
	switch r {
	case RoleViewer:
		return "viewer"
	case RoleOperator:
		return "operator"
	case RoleAdmin:
		return "admin"
	}
	return "none"
}

// ParseRole reads viewer, operator or admin.
func ParseRole(s string) (Role, error) {
	switch s {
	case "viewer":
		return RoleViewer, nil
	case "operator":
		return RoleOperator, nil
	case "admin":
		return RoleAdmin, nil
	}
	return RoleNone, fmt.Errorf("role: %q, want viewer, operator or admin", s)
}

// SecurityOptions configure credential enforcement and per-stream limits.
// Zero values take the defaults named below.
type SecurityOptions struct {
	// RequireTokens makes every call need a credential even while none is
	// issued (every call is then refused until one is). Set it whenever the
	// gateway serves TLS or listens beyond loopback. False means the
	// development rule above.
	RequireTokens bool
	// DeviceRate is the sustained number of messages per second one device
	// stream may send; more are rejected with REJECT_REASON_RATE_LIMITED and
	// the stream goes on. 0 means 200 (a 1000 Hz device in 25-sample chunks
	// sends 40).
	DeviceRate float64
	// DeviceBurst is how many messages a stream may send at once above the
	// rate (a device catching up after a reconnect); 0 means 400.
	DeviceBurst int
	// AuthAuditPerMinute bounds audit entries for failed authentication or
	// authorization per remote host per minute; 0 means 10.
	AuthAuditPerMinute int
	// SecureCookies marks web session cookies Secure even when the request
	// did not arrive over TLS (a TLS-terminating proxy in front); requests
	// over TLS always get Secure cookies.
	SecureCookies bool
	// SessionTTL is how long a web login lasts; 0 means 12 h.
	SessionTTL time.Duration
}

func (o *SecurityOptions) setDefaults() {
	if o.DeviceRate == 0 {
		o.DeviceRate = 200
	}
	if o.DeviceBurst == 0 {
		o.DeviceBurst = 400
	}
	if o.AuthAuditPerMinute == 0 {
		o.AuthAuditPerMinute = 10
	}
	if o.SessionTTL == 0 {
		o.SessionTTL = 12 * time.Hour
	}
}

func (o SecurityOptions) validate() error {
	switch {
	case o.DeviceRate < 0 || o.DeviceRate > 1e6:
		return fmt.Errorf("gateway: SecurityOptions.DeviceRate: %v, want 0..1e6 messages/s (0 = 200)", o.DeviceRate)
	case o.DeviceBurst < 0 || o.DeviceBurst > 1e6:
		return fmt.Errorf("gateway: SecurityOptions.DeviceBurst: %d, want 0..1e6 (0 = 400)", o.DeviceBurst)
	case o.AuthAuditPerMinute < 0:
		return fmt.Errorf("gateway: SecurityOptions.AuthAuditPerMinute: %d, want >= 0 (0 = 10)", o.AuthAuditPerMinute)
	case o.SessionTTL < 0:
		return fmt.Errorf("gateway: SecurityOptions.SessionTTL: %v, want >= 0 (0 = 12h)", o.SessionTTL)
	}
	return nil
}

// SetSecurity replaces the security options; call it before Serve.
func (g *Gateway) SetSecurity(o SecurityOptions) error {
	if err := o.validate(); err != nil {
		return err
	}
	o.setDefaults()
	a := g.auth
	a.mu.Lock()
	a.opt = o
	a.mu.Unlock()
	a.limiter.setPerMinute(o.AuthAuditPerMinute)
	return nil
}

// AuthMode describes enforcement for the start-up message.
func (g *Gateway) AuthMode() string {
	a := g.auth
	a.mu.RLock()
	defer a.mu.RUnlock()
	switch {
	case len(a.tokens) > 0:
		return fmt.Sprintf("tokens required (%d credentials in the store)", len(a.tokens))
	case a.opt.RequireTokens:
		return "tokens required, but none is issued yet: every call is refused until one is " +
			"(stop the gateway and run `pulsefleet token issue --data DIR --operator NAME --role admin`)"
	}
	return "OPEN for development: no credentials are issued, calls from loopback need no token " +
		"and others are refused; issue one with `pulsefleet token issue` to require tokens"
}

// principal is who makes a call.
type principal struct {
	Kind    string // "device", "operator" or "anonymous" (open gateway)
	Subject string // device id or operator name
	Role    Role
	TokenID string
}

// actor names the principal in the audit log.
func (p principal) actor() string {
	switch p.Kind {
	case "device":
		return "device:" + p.Subject
	case "operator":
		return p.Subject
	}
	return "anonymous"
}

var anonymous = principal{Kind: "anonymous", Role: RoleAdmin}

type principalKey struct{}

// principalFrom returns the caller set by the guards (ok false when none).
func principalFrom(ctx context.Context) (principal, bool) {
	p, ok := ctx.Value(principalKey{}).(principal)
	return p, ok
}

func withPrincipal(ctx context.Context, p principal) context.Context {
	ctx = context.WithValue(ctx, principalKey{}, p)
	return context.WithValue(ctx, actorKey{}, p.actor())
}

// actorFrom names who is calling, for the audit log.
func actorFrom(ctx context.Context) string {
	if v, ok := ctx.Value(actorKey{}).(string); ok && v != "" {
		return v
	}
	return "anonymous"
}

type actorKey struct{}

// remoteKey carries the client address of a web request (webHandler).
type remoteKey struct{}

// remoteFrom returns the client address of a call: the web client's, or
// the gRPC peer's.
func remoteFrom(ctx context.Context) string {
	if a, ok := ctx.Value(remoteKey{}).(string); ok && a != "" {
		return a
	}
	if p, ok := peer.FromContext(ctx); ok {
		return p.Addr.String()
	}
	return ""
}

// Authentication errors (wrapped with detail).
var (
	errNoCredential      = errors.New("no credential")
	errUnknownCredential = errors.New("unknown credential")
	errRevokedCredential = errors.New("revoked credential")
)

// authState is the gateway's view of credentials. The gateway holds the
// store's lock while it runs, so every change goes through it and the
// in-memory copy is authoritative.
type authState struct {
	mu         sync.RWMutex
	opt        SecurityOptions
	tokens     map[string]store.Token                // by hash of the secret
	sessionKey []byte                                // HMAC key of web sessions; new each start
	streams    map[string]map[*streamHandle]struct{} // open streams by credential id

	limiter    *auditLimiter
	suppressed prometheus.Counter
	panics     prometheus.Counter
}

// initAuth loads credentials and installs the gRPC guards. Called by New.
func (g *Gateway) initAuth() error {
	a := &authState{tokens: map[string]store.Token{}, sessionKey: make([]byte, 32)}
	a.opt.setDefaults()
	_, _ = rand.Read(a.sessionKey)
	a.limiter = newAuditLimiter(a.opt.AuthAuditPerMinute)
	ts, err := g.db.Tokens()
	if err != nil {
		return fmt.Errorf("gateway: load credentials: %w", err)
	}
	for _, t := range ts {
		a.tokens[t.Hash] = t
	}
	a.suppressed = prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_auth_audit_suppressed_total",
		Help: "Authentication failures not written to the audit log because of its per-host rate limit (counted in the next entry)."})
	a.panics = prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_rpc_panics_total",
		Help: "Panics recovered in API calls other than device streams (the call fails, the gateway goes on)."})
	for _, c := range []prometheus.Collector{a.suppressed, a.panics} {
		if err := g.opt.Registerer.Register(c); err != nil {
			return fmt.Errorf("gateway: metrics: %w", err)
		}
	}
	g.auth = a
	g.grpcOpts = append(g.grpcOpts, grpc.ChainUnaryInterceptor(g.unaryGuard), grpc.ChainStreamInterceptor(g.streamGuard))
	return nil
}

// hashSecret is the stored form of a token: hex SHA-256.
func hashSecret(secret string) string {
	h := sha256.Sum256([]byte(secret))
	return hex.EncodeToString(h[:])
}

// maxTokenLen bounds a presented token before it is hashed.
const maxTokenLen = 256

// authenticateBearer maps a bearer token to its principal. The web code
// calls it for the login form.
func (g *Gateway) authenticateBearer(token string) (principal, error) {
	if token == "" {
		return principal{}, errNoCredential
	}
	if len(token) > maxTokenLen {
		return principal{}, fmt.Errorf("%w (%d characters, want at most %d)", errUnknownCredential, len(token), maxTokenLen)
	}
	a := g.auth
	a.mu.RLock()
	t, ok := a.tokens[hashSecret(token)]
	a.mu.RUnlock()
	if !ok {
		return principal{}, errUnknownCredential
	}
	if t.RevokedMS != 0 {
		return principal{Kind: t.Kind, Subject: t.Subject, TokenID: t.ID}, fmt.Errorf("%w %s", errRevokedCredential, t.ID)
	}
	p := principal{Kind: t.Kind, Subject: t.Subject, TokenID: t.ID}
	if t.Kind == "operator" {
		r, err := ParseRole(t.Role)
		if err != nil {
			return principal{}, fmt.Errorf("%w: stored %s", errUnknownCredential, err)
		}
		p.Role = r
	}
	return p, nil
}

// closed reports whether every call needs a credential.
func (a *authState) closed() bool {
	a.mu.RLock()
	defer a.mu.RUnlock()
	return a.opt.RequireTokens || len(a.tokens) > 0
}

// open reports whether a call from remote needs no credential.
func (a *authState) open(remote net.Addr) bool { return !a.closed() && isLocal(remote) }

// isLocal: a loopback IP address, or a non-IP transport (in-process bufconn,
// unix socket), which is local by construction.
func isLocal(addr net.Addr) bool {
	if addr == nil {
		return false
	}
	switch v := addr.(type) {
	case *net.TCPAddr:
		return v.IP.IsLoopback()
	case *net.UDPAddr:
		return v.IP.IsLoopback()
	}
	host, _, err := net.SplitHostPort(addr.String())
	if err != nil {
		return net.ParseIP(addr.String()) == nil // not an IP address at all
	}
	if ip := net.ParseIP(host); ip != nil {
		return ip.IsLoopback()
	}
	return host == "localhost"
}

// bearerFromMD reads "authorization: Bearer TOKEN" from incoming metadata.
func bearerFromMD(ctx context.Context) string {
	md, _ := metadata.FromIncomingContext(ctx)
	for _, v := range md.Get("authorization") {
		if tok, ok := cutBearer(v); ok {
			return tok
		}
	}
	return ""
}

func cutBearer(v string) (string, bool) {
	if len(v) > 7 && strings.EqualFold(v[:7], "bearer ") {
		return strings.TrimSpace(v[7:]), true
	}
	return "", false
}

// Who may call what. Methods not listed need admin (deny by default).
const (
	needDevice = Role(255) // IngestService.Connect: a device (as itself) or admin
)

var methodRoles = map[string]Role{
	pb.IngestService_Connect_FullMethodName: needDevice,

	pb.FleetService_ListDevices_FullMethodName:       RoleViewer,
	pb.FleetService_GetDevice_FullMethodName:         RoleViewer,
	pb.FleetService_QueryTrend_FullMethodName:        RoleViewer,
	pb.FleetService_WatchEvents_FullMethodName:       RoleViewer,
	pb.FleetService_ListEpisodes_FullMethodName:      RoleViewer,
	pb.FleetService_WatchEpisodes_FullMethodName:     RoleViewer,
	pb.FleetService_GetAlarmProfile_FullMethodName:   RoleViewer,
	pb.FleetService_GetDeviceQuality_FullMethodName:  RoleViewer,
	pb.FleetService_ListDeviceQuality_FullMethodName: RoleViewer,
	pb.FleetService_AcknowledgeAlarm_FullMethodName:  RoleOperator,
	pb.FleetService_PauseAlarms_FullMethodName:       RoleOperator,
	pb.FleetService_SetAlarmProfile_FullMethodName:   RoleAdmin,

	pb.AdminService_ListAudit_FullMethodName:         RoleViewer,
	pb.AdminService_ListCalibrations_FullMethodName:  RoleViewer,
	pb.AdminService_IssueToken_FullMethodName:        RoleAdmin,
	pb.AdminService_ListTokens_FullMethodName:        RoleAdmin,
	pb.AdminService_RevokeToken_FullMethodName:       RoleAdmin,
	pb.AdminService_PutCalibration_FullMethodName:    RoleAdmin,
	pb.AdminService_AssignCalibration_FullMethodName: RoleAdmin,
}

// exempt: the standard health check and reflection answer anyone (they
// reveal no data), so load balancers and grpcurl work before logging in.
func exempt(method string) bool {
	return strings.HasPrefix(method, "/grpc.health.v1.Health/") ||
		strings.HasPrefix(method, "/grpc.reflection.v1.ServerReflection/") ||
		strings.HasPrefix(method, "/grpc.reflection.v1alpha.ServerReflection/")
}

// authorizeCall authenticates a gRPC call and checks its method's role.
func (g *Gateway) authorizeCall(ctx context.Context, method string) (context.Context, error) {
	if exempt(method) {
		return ctx, nil
	}
	var remote net.Addr
	if p, ok := peer.FromContext(ctx); ok {
		remote = p.Addr
	}
	tok := bearerFromMD(ctx)
	var p principal
	if tok == "" && g.auth.open(remote) {
		p = anonymous
	} else {
		var err error
		p, err = g.authenticateBearer(tok)
		if err != nil {
			g.authFailed(ctx, remoteFrom(ctx), "auth.failure", p, "", fmt.Sprintf("%s: %v", method, err))
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
		g.authFailed(ctx, remoteFrom(ctx), "auth.denied", p, "", fmt.Sprintf("%s: a %s credential may not stream; a device or admin one may", method, p.Role))
		return ctx, status.Errorf(codes.PermissionDenied, "%s: streaming needs a device credential (or admin); %s has role %s", method, p.actor(), p.Role)
	case p.Kind == "device":
		g.authFailed(ctx, remoteFrom(ctx), "auth.denied", p, p.Subject, method+": device credentials may only stream")
		return ctx, status.Errorf(codes.PermissionDenied, "%s: device credentials may only stream (IngestService.Connect)", method)
	case p.Role < need:
		g.authFailed(ctx, remoteFrom(ctx), "auth.denied", p, "", fmt.Sprintf("%s: needs role %s, has %s", method, need, p.Role))
		return ctx, status.Errorf(codes.PermissionDenied, "%s: needs role %s; %s has role %s", method, need, p.actor(), p.Role)
	}
	return withPrincipal(ctx, p), nil
}

// authorizeDevice checks that the stream's credential may speak for deviceID.
func (g *Gateway) authorizeDevice(ctx context.Context, deviceID, remote string) error {
	p, ok := principalFrom(ctx)
	if !ok {
		// Not through the guards (a test calling Connect directly): only an
		// open gateway lets it in.
		if g.auth.closed() {
			return status.Error(codes.Unauthenticated, "no credential")
		}
		return nil
	}
	if p.Kind == "device" && p.Subject != deviceID {
		g.authFailed(ctx, remoteFrom(ctx), "auth.denied", p, deviceID, fmt.Sprintf("credential %s of device %s may not stream as %s", p.TokenID, p.Subject, deviceID))
		return status.Errorf(codes.PermissionDenied, "introduction.device_id: %q, but the credential belongs to device %q: a device may stream only as itself", deviceID, p.Subject)
	}
	return nil
}

// authFailed counts a refused call and audits it within the per-host limit.
func (g *Gateway) authFailed(ctx context.Context, remote, action string, p principal, device, detail string) {
	a := g.auth
	g.m.authFailures.WithLabelValues(failureReason(action, detail)).Inc()
	ok, suppressed := a.limiter.allow(hostOf(remote), g.nowMS())
	if !ok {
		a.suppressed.Inc()
		return
	}
	if suppressed > 0 {
		detail += fmt.Sprintf(" (and %d more refused calls from this host not logged one by one)", suppressed)
	}
	actor := "unknown"
	if p.Kind != "" {
		actor = p.actor()
	}
	g.log.Warn("call refused", "action", action, "actor", actor, "remote", remote, "detail", detail)
	g.audit(ctx, actor, action, device, detail, remote)
}

// failureReason labels pulsefleet_auth_failures_total.
func failureReason(action, detail string) string {
	switch {
	case action == "auth.denied":
		return "denied"
	case strings.Contains(detail, errNoCredential.Error()):
		return "no_credential"
	case strings.Contains(detail, errRevokedCredential.Error()):
		return "revoked_credential"
	}
	return "unknown_credential"
}

func hostOf(remote string) string {
	if h, _, err := net.SplitHostPort(remote); err == nil {
		return h
	}
	return remote
}

// guardedStream carries the authenticated context into a streaming handler.
type guardedStream struct {
	grpc.ServerStream
	ctx context.Context
}

func (s *guardedStream) Context() context.Context { return s.ctx }

func (g *Gateway) unaryGuard(ctx context.Context, req any, info *grpc.UnaryServerInfo, h grpc.UnaryHandler) (resp any, err error) {
	defer g.recoverCall(info.FullMethod, &err)
	ctx, err = g.authorizeCall(ctx, info.FullMethod)
	if err != nil {
		return nil, err
	}
	return h(ctx, req)
}

func (g *Gateway) streamGuard(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) (err error) {
	defer g.recoverCall(info.FullMethod, &err)
	ctx, err := g.authorizeCall(ss.Context(), info.FullMethod)
	if err != nil {
		return err
	}
	if p, ok := principalFrom(ctx); ok && p.TokenID != "" {
		// Streams made with a credential end when it is revoked; a device
		// credential holds at most a few at once (one per device, a few
		// overlapping while one replaces another), so idle streams cannot
		// pile up in the gateway's memory.
		var cancel context.CancelCauseFunc
		ctx, cancel = context.WithCancelCause(ctx)
		defer cancel(nil)
		hd := &streamHandle{cancel: cancel}
		if !g.auth.openStream(p, hd) {
			g.authFailed(ctx, remoteFrom(ctx), "auth.denied", p, p.Subject, fmt.Sprintf("%s: more than %d open streams with credential %s", info.FullMethod, maxDeviceStreams, p.TokenID))
			return status.Errorf(codes.ResourceExhausted, "device %s already has %d open streams; close them (a new stream replaces the device's open one)", p.Subject, maxDeviceStreams)
		}
		defer g.auth.closeStream(p.TokenID, hd)
	}
	err = h(srv, &guardedStream{ServerStream: ss, ctx: ctx})
	if errors.Is(context.Cause(ctx), errRevoked) {
		// Whatever the handler saw (a cancelled context, a broken send),
		// the stream ended because its credential was revoked.
		return status.Errorf(codes.Unauthenticated, "credential revoked; the stream ended (%s)", info.FullMethod)
	}
	return err
}

// maxDeviceStreams bounds the concurrent streams of one device credential.
const maxDeviceStreams = 4

// errRevoked ends the streams of a revoked credential.
var errRevoked = errors.New("credential revoked")

// streamHandle is one open stream made with a credential.
type streamHandle struct{ cancel context.CancelCauseFunc }

// openStream registers a stream made with p's credential; false when a
// device credential already holds maxDeviceStreams.
func (a *authState) openStream(p principal, h *streamHandle) bool {
	a.mu.Lock()
	defer a.mu.Unlock()
	if a.streams == nil {
		a.streams = map[string]map[*streamHandle]struct{}{}
	}
	set := a.streams[p.TokenID]
	if p.Kind == "device" && len(set) >= maxDeviceStreams {
		return false
	}
	if set == nil {
		set = map[*streamHandle]struct{}{}
		a.streams[p.TokenID] = set
	}
	set[h] = struct{}{}
	return true
}

func (a *authState) closeStream(tokenID string, h *streamHandle) {
	a.mu.Lock()
	defer a.mu.Unlock()
	delete(a.streams[tokenID], h)
	if len(a.streams[tokenID]) == 0 {
		delete(a.streams, tokenID)
	}
}

// endStreams ends every open stream made with credential tokenID.
func (a *authState) endStreams(tokenID string) {
	a.mu.Lock()
	defer a.mu.Unlock()
	for h := range a.streams[tokenID] {
		h.cancel(errRevoked)
	}
}

// recoverCall turns a panic in an API call into INTERNAL: no input may take
// the gateway down.
func (g *Gateway) recoverCall(method string, err *error) {
	if p := recover(); p != nil {
		g.auth.panics.Inc()
		g.log.Error("panic in API call", "method", method, "panic", p, "stack", string(debug.Stack()))
		*err = status.Errorf(codes.Internal, "internal error in %s (recovered; the gateway goes on)", method)
	}
}

// ---- Web: login, session cookie, CSRF, role checks ----
//
// The web page uses the same credentials. POST /login with form field
// "token" checks it like a bearer token and sets a session cookie
// (HMAC-signed, HttpOnly, SameSite=Strict, Secure over TLS) that names the
// credential, so revoking the token ends the session at once. Unsafe
// requests (POST, PUT, PATCH, DELETE) made with the cookie must carry the
// session's CSRF token in the X-CSRF-Token header or the "csrf" form field,
// and pass the browser's cross-origin check (Sec-Fetch-Site / Origin).
// Requests may instead carry "Authorization: Bearer TOKEN" (scripts); those
// need no CSRF token.

const sessionCookie = "pulsefleet_session"

// session is the content of a session cookie.
type session struct {
	tokenHash string // credential the session was made from ("" = anonymous on an open gateway)
	expiresMS int64
	nonce     string // random, ties the CSRF token to this session
}

func (a *authState) sign(payload string) string {
	m := hmac.New(sha256.New, a.sessionKey)
	m.Write([]byte(payload))
	return base64.RawURLEncoding.EncodeToString(m.Sum(nil))
}

// issueSession starts a web session for the credential token (already
// checked) and returns its CSRF token.
func (g *Gateway) issueSession(w http.ResponseWriter, r *http.Request, token string) string {
	a := g.auth
	var nb [16]byte
	_, _ = rand.Read(nb[:])
	a.mu.RLock()
	ttl, secure := a.opt.SessionTTL, a.opt.SecureCookies
	a.mu.RUnlock()
	s := session{expiresMS: g.nowMS() + ttl.Milliseconds(), nonce: base64.RawURLEncoding.EncodeToString(nb[:])}
	if token != "" {
		s.tokenHash = hashSecret(token)
	}
	payload := "v1." + s.tokenHash + "." + strconv.FormatInt(s.expiresMS, 10) + "." + s.nonce
	http.SetCookie(w, &http.Cookie{Name: sessionCookie, Value: payload + "." + a.sign(payload), Path: "/",
		MaxAge: int(ttl.Seconds()), HttpOnly: true, Secure: secure || r.TLS != nil, SameSite: http.SameSiteStrictMode})
	return g.csrfFor(s)
}

// clearSession ends the browser's session.
func (g *Gateway) clearSession(w http.ResponseWriter, r *http.Request) {
	g.auth.mu.RLock()
	secure := g.auth.opt.SecureCookies
	g.auth.mu.RUnlock()
	http.SetCookie(w, &http.Cookie{Name: sessionCookie, Value: "", Path: "/", MaxAge: -1, HttpOnly: true,
		Secure: secure || r.TLS != nil, SameSite: http.SameSiteStrictMode})
}

func (g *Gateway) csrfFor(s session) string { return g.auth.sign("csrf." + s.nonce) }

// sessionFrom checks the session cookie of r.
func (g *Gateway) sessionFrom(r *http.Request) (session, error) {
	c, err := r.Cookie(sessionCookie)
	if err != nil {
		return session{}, errNoCredential
	}
	parts := strings.Split(c.Value, ".")
	if len(parts) != 5 || parts[0] != "v1" {
		return session{}, fmt.Errorf("%w: malformed session cookie", errUnknownCredential)
	}
	payload := strings.Join(parts[:4], ".")
	if !hmac.Equal([]byte(parts[4]), []byte(g.auth.sign(payload))) {
		return session{}, fmt.Errorf("%w: session cookie signature does not match (the gateway restarted, or the cookie was altered)", errUnknownCredential)
	}
	exp, err := strconv.ParseInt(parts[2], 10, 64)
	if err != nil {
		return session{}, fmt.Errorf("%w: malformed session expiry", errUnknownCredential)
	}
	if exp < g.nowMS() {
		return session{}, fmt.Errorf("%w: session expired", errUnknownCredential)
	}
	return session{tokenHash: parts[1], expiresMS: exp, nonce: parts[3]}, nil
}

// principalOfSession maps a checked session to its principal, looking the
// credential up again so revocation applies at once.
func (g *Gateway) principalOfSession(s session, remote net.Addr) (principal, error) {
	if s.tokenHash == "" {
		if g.auth.open(remote) {
			return anonymous, nil
		}
		return principal{}, fmt.Errorf("%w: an anonymous session, but the gateway now requires tokens", errUnknownCredential)
	}
	a := g.auth
	a.mu.RLock()
	t, ok := a.tokens[s.tokenHash]
	a.mu.RUnlock()
	switch {
	case !ok:
		return principal{}, errUnknownCredential
	case t.RevokedMS != 0:
		return principal{Kind: t.Kind, Subject: t.Subject, TokenID: t.ID}, fmt.Errorf("%w %s", errRevokedCredential, t.ID)
	case t.Kind != "operator":
		return principal{}, fmt.Errorf("%w: device credentials cannot log in to the web page", errUnknownCredential)
	}
	role, err := ParseRole(t.Role)
	if err != nil {
		return principal{}, fmt.Errorf("%w: %v", errUnknownCredential, err)
	}
	return principal{Kind: t.Kind, Subject: t.Subject, Role: role, TokenID: t.ID}, nil
}

// checkCSRF verifies the CSRF token of an unsafe request made with session s.
func (g *Gateway) checkCSRF(r *http.Request, s session) error {
	got := r.Header.Get("X-CSRF-Token")
	if got == "" {
		got = r.PostFormValue("csrf")
	}
	if got == "" || subtle.ConstantTimeCompare([]byte(got), []byte(g.csrfFor(s))) != 1 {
		return errors.New("missing or wrong CSRF token")
	}
	return nil
}

// webCSRFToken returns the CSRF token of r's session ("" without one), for
// pages to embed in forms and scripts.
func (g *Gateway) webCSRFToken(r *http.Request) string {
	s, err := g.sessionFrom(r)
	if err != nil {
		return ""
	}
	return g.csrfFor(s)
}

var crossOrigin = http.NewCrossOriginProtection()

func unsafeMethod(m string) bool {
	return m != http.MethodGet && m != http.MethodHead && m != http.MethodOptions
}

func httpRemote(r *http.Request) net.Addr {
	if ap, err := net.ResolveTCPAddr("tcp", r.RemoteAddr); err == nil {
		return ap
	}
	return nil
}

// webPrincipal authenticates an HTTP request: a bearer header, else the
// session cookie (with CSRF checks on unsafe methods), else anonymous on an
// open gateway.
func (g *Gateway) webPrincipal(r *http.Request) (principal, int, error) {
	remote := httpRemote(r)
	if tok, ok := cutBearer(r.Header.Get("Authorization")); ok {
		p, err := g.authenticateBearer(tok)
		if err != nil {
			return p, http.StatusUnauthorized, err
		}
		return p, 0, nil
	}
	s, err := g.sessionFrom(r)
	if errors.Is(err, errNoCredential) && g.auth.open(remote) {
		return anonymous, 0, nil
	}
	if err != nil {
		return principal{}, http.StatusUnauthorized, err
	}
	p, err := g.principalOfSession(s, remote)
	if err != nil {
		return p, http.StatusUnauthorized, err
	}
	if unsafeMethod(r.Method) {
		if err := crossOrigin.Check(r); err != nil {
			return p, http.StatusForbidden, err
		}
		if err := g.checkCSRF(r, s); err != nil {
			return p, http.StatusForbidden, err
		}
	}
	return p, 0, nil
}

// requireRole wraps an HTTP handler: the caller must be authenticated with
// at least role; its principal is in the request context (actorFrom works).
// Refusals answer 401 (not logged in) or 403 and are audited like gRPC ones.
func (g *Gateway) requireRole(role Role, h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		p, code, err := g.webPrincipal(r)
		if err == nil && (p.Kind == "device" || p.Role < role) {
			code, err = http.StatusForbidden, fmt.Errorf("needs role %s; %s has role %s", role, p.actor(), p.Role)
		}
		if err != nil {
			action := "auth.failure"
			if code == http.StatusForbidden {
				action = "auth.denied"
			}
			g.authFailed(r.Context(), r.RemoteAddr, action, p, "", fmt.Sprintf("web %s %s: %v", r.Method, r.URL.Path, err))
			if code == http.StatusUnauthorized && r.Method == http.MethodGet && strings.Contains(r.Header.Get("Accept"), "text/html") {
				http.Redirect(w, r, "/login", http.StatusSeeOther)
				return
			}
			http.Error(w, http.StatusText(code)+": "+err.Error(), code)
			return
		}
		ctx := withPrincipal(r.Context(), p)
		if p.TokenID != "" {
			// Long requests (the page's event stream) end when the
			// credential is revoked, like gRPC streams.
			var cancel context.CancelCauseFunc
			ctx, cancel = context.WithCancelCause(ctx)
			defer cancel(nil)
			hd := &streamHandle{cancel: cancel}
			g.auth.openStream(p, hd)
			defer g.auth.closeStream(p.TokenID, hd)
		}
		h.ServeHTTP(w, r.WithContext(ctx))
	})
}

// authRoutes adds GET/POST /login and POST /logout. The web code calls it
// from its route set-up (or the gateway does when there is no web page).
func (g *Gateway) authRoutes(mux *http.ServeMux) {
	mux.HandleFunc("GET /login", g.handleLoginForm)
	mux.HandleFunc("POST /login", g.handleLogin)
	mux.Handle("POST /logout", g.requireRole(RoleViewer, http.HandlerFunc(g.handleLogout)))
}

const loginPage = `<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>pulsefleet: log in</title>
<meta name="viewport" content="width=device-width, initial-scale=1"></head>
<body><main>
<h1>pulsefleet</h1>
<p>` + caution.Text + `</p>
<form method="post" action="/login">
<label for="token">Operator token</label>
<input id="token" name="token" type="password" autocomplete="current-password" required>
<button type="submit">Log in</button>
</form>
%s
</main></body></html>
`

func (g *Gateway) handleLoginForm(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.Header().Set("Content-Security-Policy", "default-src 'none'; form-action 'self'; frame-ancestors 'none'")
	msg := ""
	if r.URL.Query().Get("failed") != "" {
		msg = `<p role="alert">That token was not accepted.</p>`
	}
	fmt.Fprintf(w, loginPage, msg)
}

// handleLogin checks the token of the login form and starts a session.
func (g *Gateway) handleLogin(w http.ResponseWriter, r *http.Request) {
	if err := crossOrigin.Check(r); err != nil {
		http.Error(w, "Forbidden: "+err.Error(), http.StatusForbidden)
		return
	}
	r.Body = http.MaxBytesReader(w, r.Body, 4<<10)
	tok := strings.TrimSpace(r.PostFormValue("token"))
	p, err := g.authenticateBearer(tok)
	if err == nil && p.Kind != "operator" {
		err = errors.New("device credentials cannot log in to the web page")
	}
	if err != nil {
		g.authFailed(r.Context(), r.RemoteAddr, "auth.failure", p, "", "web login: "+err.Error())
		http.Redirect(w, r, "/login?failed=1", http.StatusSeeOther)
		return
	}
	g.issueSession(w, r, tok)
	g.audit(r.Context(), p.actor(), "auth.login", "", "web login with credential "+p.TokenID, r.RemoteAddr)
	http.Redirect(w, r, "/", http.StatusSeeOther)
}

func (g *Gateway) handleLogout(w http.ResponseWriter, r *http.Request) {
	g.clearSession(w, r)
	http.Redirect(w, r, "/login", http.StatusSeeOther)
}
