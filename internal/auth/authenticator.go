package auth

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"strings"
	"sync"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Authentication errors (wrapped with detail).
var (
	ErrNoCredential      = errors.New("no credential")
	ErrUnknownCredential = errors.New("unknown credential")
	ErrRevokedCredential = errors.New("revoked credential")
)

// Options configure enforcement; they may change while the gateway runs
// (SetOptions).
type Options struct {
	// RequireTokens makes every call need a credential even while none is
	// issued. False means the development rule (see the package comment).
	RequireTokens bool
	// AuditPerMinute bounds audit entries for refused calls per remote host
	// per minute (ten times that over all hosts together).
	AuditPerMinute int
}

// TokenStore is what the Authenticator reads credentials from at start.
type TokenStore interface {
	Tokens() ([]store.Token, error)
}

// Config wires an Authenticator to the gateway that owns it.
type Config struct {
	Store      TokenStore
	Registerer prometheus.Registerer
	Log        *slog.Logger
	// NowMS is the gateway clock in milliseconds (the audit limiter's windows).
	NowMS func() int64
	// Audit writes one audit entry (the gateway's audit log).
	Audit func(ctx context.Context, actor, action, device, detail, remote string)
}

// Authenticator is the gateway's view of credentials. The gateway holds the
// store's lock while it runs, so every change goes through it (Put) and the
// in-memory copy is authoritative. It also keeps the open streams made with
// each credential, so a revocation ends them at once.
type Authenticator struct {
	cfg Config

	mu      sync.RWMutex
	opt     Options
	tokens  map[string]store.Token                // by hash of the secret
	streams map[string]map[*streamHandle]struct{} // open streams by credential id

	limiter    *auditLimiter
	failures   *prometheus.CounterVec // by reason
	suppressed prometheus.Counter
	panics     prometheus.Counter
}

// New loads the credentials of cfg.Store and registers the metrics
// pulsefleet_auth_failures_total, pulsefleet_auth_audit_suppressed_total and
// pulsefleet_rpc_panics_total.
func New(cfg Config, opt Options) (*Authenticator, error) {
	a := &Authenticator{cfg: cfg, opt: opt, tokens: map[string]store.Token{}, limiter: newAuditLimiter(opt.AuditPerMinute)}
	ts, err := cfg.Store.Tokens()
	if err != nil {
		return nil, fmt.Errorf("load credentials: %w", err)
	}
	for _, t := range ts {
		a.tokens[t.Hash] = t
	}
	a.failures = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_auth_failures_total",
		Help: "Refused credentials, by reason."}, []string{"reason"})
	a.suppressed = prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_auth_audit_suppressed_total",
		Help: "Authentication failures not written to the audit log because of its per-host rate limit (counted in the next entry)."})
	a.panics = prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_rpc_panics_total",
		Help: "Panics recovered in API calls other than device streams (the call fails, the gateway goes on)."})
	for _, c := range []prometheus.Collector{a.failures, a.suppressed, a.panics} {
		if err := cfg.Registerer.Register(c); err != nil {
			return nil, fmt.Errorf("metrics: %w", err)
		}
	}
	return a, nil
}

// SetOptions replaces the options.
func (a *Authenticator) SetOptions(o Options) {
	a.mu.Lock()
	a.opt = o
	a.mu.Unlock()
	a.limiter.setPerMinute(o.AuditPerMinute)
}

// Mode describes enforcement for the start-up message.
func (a *Authenticator) Mode() string {
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

// Put records a credential just issued or revoked through the running
// gateway; a revoked one's open streams end at once.
func (a *Authenticator) Put(t store.Token) {
	a.mu.Lock()
	a.tokens[t.Hash] = t
	a.mu.Unlock()
	if t.RevokedMS != 0 {
		a.endStreams(t.ID)
	}
}

// maxTokenLen bounds a presented token before it is hashed.
const maxTokenLen = 256

// Authenticate maps a bearer token to its principal.
func (a *Authenticator) Authenticate(token string) (Principal, error) {
	if token == "" {
		return Principal{}, ErrNoCredential
	}
	if len(token) > maxTokenLen {
		return Principal{}, fmt.Errorf("%w (%d characters, want at most %d)", ErrUnknownCredential, len(token), maxTokenLen)
	}
	a.mu.RLock()
	t, ok := a.tokens[HashSecret(token)]
	a.mu.RUnlock()
	if !ok {
		return Principal{}, ErrUnknownCredential
	}
	if t.RevokedMS != 0 {
		return Principal{Kind: t.Kind, Subject: t.Subject, TokenID: t.ID}, fmt.Errorf("%w %s", ErrRevokedCredential, t.ID)
	}
	p := Principal{Kind: t.Kind, Subject: t.Subject, TokenID: t.ID}
	if t.Kind == "operator" {
		r, err := ParseRole(t.Role)
		if err != nil {
			return Principal{}, fmt.Errorf("%w: stored %s", ErrUnknownCredential, err)
		}
		p.Role = r
	}
	return p, nil
}

// OperatorByHash maps the hash of an operator credential (a web session
// names its credential so) to its principal, looking it up again so that a
// revocation applies at once.
func (a *Authenticator) OperatorByHash(hash string) (Principal, error) {
	a.mu.RLock()
	t, ok := a.tokens[hash]
	a.mu.RUnlock()
	switch {
	case !ok:
		return Principal{}, ErrUnknownCredential
	case t.RevokedMS != 0:
		return Principal{Kind: t.Kind, Subject: t.Subject, TokenID: t.ID}, fmt.Errorf("%w %s", ErrRevokedCredential, t.ID)
	case t.Kind != "operator":
		return Principal{}, fmt.Errorf("%w: device credentials cannot log in to the web page", ErrUnknownCredential)
	}
	role, err := ParseRole(t.Role)
	if err != nil {
		return Principal{}, fmt.Errorf("%w: %v", ErrUnknownCredential, err)
	}
	return Principal{Kind: t.Kind, Subject: t.Subject, Role: role, TokenID: t.ID}, nil
}

// Closed reports whether every call needs a credential.
func (a *Authenticator) Closed() bool {
	a.mu.RLock()
	defer a.mu.RUnlock()
	return a.opt.RequireTokens || len(a.tokens) > 0
}

// Open reports whether a call from remote needs no credential.
func (a *Authenticator) Open(remote net.Addr) bool { return !a.Closed() && IsLocal(remote) }

// IsLocal: a loopback IP address, or a non-IP transport (in-process bufconn,
// unix socket), which is local by construction.
func IsLocal(addr net.Addr) bool {
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

// CutBearer reads the token of an "Authorization: Bearer TOKEN" value.
func CutBearer(v string) (string, bool) {
	if len(v) > 7 && strings.EqualFold(v[:7], "bearer ") {
		return strings.TrimSpace(v[7:]), true
	}
	return "", false
}

// Failed counts a refused call and audits it within the per-host limit.
func (a *Authenticator) Failed(ctx context.Context, remote, action string, p Principal, device, detail string) {
	a.failures.WithLabelValues(failureReason(action, detail)).Inc()
	ok, suppressed := a.limiter.allow(hostOf(remote), a.cfg.NowMS())
	if !ok {
		a.suppressed.Inc()
		return
	}
	if suppressed > 0 {
		detail += fmt.Sprintf(" (and %d more refused calls from this host not logged one by one)", suppressed)
	}
	actor := "unknown"
	if p.Kind != "" {
		actor = p.Actor()
	}
	a.cfg.Log.Warn("call refused", "action", action, "actor", actor, "remote", remote, "detail", detail)
	a.cfg.Audit(ctx, actor, action, device, detail, remote)
}

// failureReason labels pulsefleet_auth_failures_total.
func failureReason(action, detail string) string {
	switch {
	case action == "auth.denied":
		return "denied"
	case strings.Contains(detail, ErrNoCredential.Error()):
		return "no_credential"
	case strings.Contains(detail, ErrRevokedCredential.Error()):
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
