package web

import (
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/base64"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/caution"
)

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

// SessionCookie is the name of the session cookie.
const SessionCookie = "pulsefleet_session"

// session is the content of a session cookie.
type session struct {
	tokenHash string // credential the session was made from ("" = anonymous on an open gateway)
	expiresMS int64
	nonce     string // random, ties the CSRF token to this session
}

func (sv *Server) sign(payload string) string {
	m := hmac.New(sha256.New, sv.sessionKey)
	m.Write([]byte(payload))
	return base64.RawURLEncoding.EncodeToString(m.Sum(nil))
}

// issueSession starts a web session for the credential token (already
// checked) and returns its CSRF token.
func (sv *Server) issueSession(w http.ResponseWriter, r *http.Request, token string) string {
	var nb [16]byte
	_, _ = rand.Read(nb[:])
	sec := sv.cfg.Sessions()
	ttl, secure := sec.TTL, sec.SecureCookies
	s := session{expiresMS: sv.fleet.NowMS() + ttl.Milliseconds(), nonce: base64.RawURLEncoding.EncodeToString(nb[:])}
	if token != "" {
		s.tokenHash = auth.HashSecret(token)
	}
	payload := "v1." + s.tokenHash + "." + strconv.FormatInt(s.expiresMS, 10) + "." + s.nonce
	http.SetCookie(w, &http.Cookie{Name: SessionCookie, Value: payload + "." + sv.sign(payload), Path: "/",
		MaxAge: int(ttl.Seconds()), HttpOnly: true, Secure: secure || r.TLS != nil, SameSite: http.SameSiteStrictMode})
	return sv.csrfFor(s)
}

// clearSession ends the browser's session.
func (sv *Server) clearSession(w http.ResponseWriter, r *http.Request) {
	secure := sv.cfg.Sessions().SecureCookies
	http.SetCookie(w, &http.Cookie{Name: SessionCookie, Value: "", Path: "/", MaxAge: -1, HttpOnly: true,
		Secure: secure || r.TLS != nil, SameSite: http.SameSiteStrictMode})
}

func (sv *Server) csrfFor(s session) string { return sv.sign("csrf." + s.nonce) }

// sessionFrom checks the session cookie of r.
func (sv *Server) sessionFrom(r *http.Request) (session, error) {
	c, err := r.Cookie(SessionCookie)
	if err != nil {
		return session{}, auth.ErrNoCredential
	}
	parts := strings.Split(c.Value, ".")
	if len(parts) != 5 || parts[0] != "v1" {
		return session{}, fmt.Errorf("%w: malformed session cookie", auth.ErrUnknownCredential)
	}
	payload := strings.Join(parts[:4], ".")
	if !hmac.Equal([]byte(parts[4]), []byte(sv.sign(payload))) {
		return session{}, fmt.Errorf("%w: session cookie signature does not match (the gateway restarted, or the cookie was altered)", auth.ErrUnknownCredential)
	}
	exp, err := strconv.ParseInt(parts[2], 10, 64)
	if err != nil {
		return session{}, fmt.Errorf("%w: malformed session expiry", auth.ErrUnknownCredential)
	}
	if exp < sv.fleet.NowMS() {
		return session{}, fmt.Errorf("%w: session expired", auth.ErrUnknownCredential)
	}
	return session{tokenHash: parts[1], expiresMS: exp, nonce: parts[3]}, nil
}

// principalOfSession maps a checked session to its principal, looking the
// credential up again so revocation applies at once.
func (sv *Server) principalOfSession(s session, remote net.Addr) (auth.Principal, error) {
	if s.tokenHash == "" {
		if sv.auth.Open(remote) {
			return auth.Anonymous, nil
		}
		return auth.Principal{}, fmt.Errorf("%w: an anonymous session, but the gateway now requires tokens", auth.ErrUnknownCredential)
	}
	return sv.auth.OperatorByHash(s.tokenHash)
}

// checkCSRF verifies the CSRF token of an unsafe request made with session s.
func (sv *Server) checkCSRF(r *http.Request, s session) error {
	got := r.Header.Get("X-CSRF-Token")
	if got == "" {
		got = r.PostFormValue("csrf")
	}
	if got == "" || subtle.ConstantTimeCompare([]byte(got), []byte(sv.csrfFor(s))) != 1 {
		return errors.New("missing or wrong CSRF token")
	}
	return nil
}

// CSRFToken returns the CSRF token of r's session ("" without one), for
// pages to embed in forms and scripts.
func (sv *Server) CSRFToken(r *http.Request) string {
	s, err := sv.sessionFrom(r)
	if err != nil {
		return ""
	}
	return sv.csrfFor(s)
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
func (sv *Server) webPrincipal(r *http.Request) (auth.Principal, int, error) {
	remote := httpRemote(r)
	if tok, ok := auth.CutBearer(r.Header.Get("Authorization")); ok {
		p, err := sv.auth.Authenticate(tok)
		if err != nil {
			return p, http.StatusUnauthorized, err
		}
		return p, 0, nil
	}
	s, err := sv.sessionFrom(r)
	if errors.Is(err, auth.ErrNoCredential) && sv.auth.Open(remote) {
		return auth.Anonymous, 0, nil
	}
	if err != nil {
		return auth.Principal{}, http.StatusUnauthorized, err
	}
	p, err := sv.principalOfSession(s, remote)
	if err != nil {
		return p, http.StatusUnauthorized, err
	}
	if unsafeMethod(r.Method) {
		if err := crossOrigin.Check(r); err != nil {
			return p, http.StatusForbidden, err
		}
		if err := sv.checkCSRF(r, s); err != nil {
			return p, http.StatusForbidden, err
		}
	}
	return p, 0, nil
}

// requireRole wraps an HTTP handler: the caller must be authenticated with
// at least role; its principal is in the request context (actorFrom works).
// Refusals answer 401 (not logged in) or 403 and are audited like gRPC ones.
func (sv *Server) requireRole(role auth.Role, h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		p, code, err := sv.webPrincipal(r)
		if err == nil && (p.Kind == "device" || p.Role < role) {
			code, err = http.StatusForbidden, fmt.Errorf("needs role %s; %s has role %s", role, p.Actor(), p.Role)
		}
		if err != nil {
			action := "auth.failure"
			if code == http.StatusForbidden {
				action = "auth.denied"
			}
			sv.auth.Failed(r.Context(), r.RemoteAddr, action, p, "", fmt.Sprintf("web %s %s: %v", r.Method, r.URL.Path, err))
			if code == http.StatusUnauthorized && r.Method == http.MethodGet && strings.Contains(r.Header.Get("Accept"), "text/html") {
				http.Redirect(w, r, "/login", http.StatusSeeOther)
				return
			}
			http.Error(w, http.StatusText(code)+": "+err.Error(), code)
			return
		}
		ctx := auth.WithPrincipal(r.Context(), p)
		if p.TokenID != "" {
			// Long requests (the page's event stream) end when the
			// credential is revoked, like gRPC streams.
			var release func()
			ctx, release, _ = sv.auth.OpenStream(ctx, p)
			defer release()
		}
		h.ServeHTTP(w, r.WithContext(ctx))
	})
}

// authRoutes adds GET/POST /login and POST /logout. The web code calls it
// from its route set-up (or the gateway does when there is no web page).
func (sv *Server) authRoutes(mux *http.ServeMux) {
	mux.HandleFunc("GET /login", sv.handleLoginForm)
	mux.HandleFunc("POST /login", sv.handleLogin)
	mux.Handle("POST /logout", sv.requireRole(auth.RoleViewer, http.HandlerFunc(sv.handleLogout)))
}

// loginStyle is the login page's own style sheet, inline (the page's
// assets need a login) and allowed by its hash in the page's CSP.
const loginStyle = `
body { margin: 0; font-family: "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif; font-size: 15px; color: #1e242c; background: #f6f6f3; }
.caution { background: #fff4cc; border-bottom: 2px solid #8a6d00; padding: 8px 16px; line-height: 1.4; }
.caution b { border: 2px solid #8a6d00; padding: 0 6px; margin-right: 8px; text-transform: uppercase; letter-spacing: 0.06em; }
main { max-width: 24em; margin: 48px auto; background: #fff; border: 1px solid #d9dcd6; border-radius: 4px; padding: 20px 24px; }
h1 { font-size: 20px; margin: 0 0 4px; letter-spacing: 0.02em; }
p.sub { color: #5d6673; margin: 0 0 18px; }
label { display: block; font-weight: 600; margin-bottom: 4px; }
input { font: inherit; width: 100%; box-sizing: border-box; padding: 6px 8px; border: 1px solid #8b929c; border-radius: 3px; }
button { font: inherit; font-weight: 600; margin-top: 12px; padding: 6px 16px; border: 1px solid #1e242c; background: #1e242c; color: #fff; border-radius: 3px; cursor: pointer; }
input:focus-visible, button:focus-visible { outline: 3px solid #1b7fc4; outline-offset: 2px; }
.err { border-left: 4px solid #a3231b; padding: 4px 10px; background: #fbe9e7; margin: 0 0 12px; }
@media (max-width: 480px) { main { margin: 16px 8px; } }
`

var loginStyleHash = func() string {
	sum := sha256.Sum256([]byte(loginStyle))
	return "'sha256-" + base64.StdEncoding.EncodeToString(sum[:]) + "'"
}()

const loginPage = `<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>pulsefleet: log in</title>
<meta name="viewport" content="width=device-width, initial-scale=1">
<style>` + loginStyle + `</style></head>
<body>
<div class="caution" role="note" id="caution"><b>Caution</b> ` + caution.Text + `</div>
<main>
<h1>pulsefleet</h1>
<p class="sub">Log in with the operator token your administrator issued.</p>
<!--message-->
<form method="post" action="/login">
<label for="token">Operator token</label>
<input id="token" name="token" type="password" autocomplete="current-password" required>
<button type="submit">Log in</button>
</form>
</main></body></html>
`

func (sv *Server) handleLoginForm(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.Header().Set("Content-Security-Policy", "default-src 'none'; style-src "+loginStyleHash+"; form-action 'self'; frame-ancestors 'none'")
	msg := ""
	if r.URL.Query().Get("failed") != "" {
		msg = `<p class="err" role="alert">That token was not accepted.</p>`
	}
	// Not a format: the style sheet holds per-cent signs.
	_, _ = io.WriteString(w, strings.Replace(loginPage, "<!--message-->", msg, 1))
}

// handleLogin checks the token of the login form and starts a session.
func (sv *Server) handleLogin(w http.ResponseWriter, r *http.Request) {
	if err := crossOrigin.Check(r); err != nil {
		http.Error(w, "Forbidden: "+err.Error(), http.StatusForbidden)
		return
	}
	r.Body = http.MaxBytesReader(w, r.Body, 4<<10)
	tok := strings.TrimSpace(r.PostFormValue("token"))
	p, err := sv.auth.Authenticate(tok)
	if err == nil && p.Kind != "operator" {
		err = errors.New("device credentials cannot log in to the web page")
	}
	if err != nil {
		sv.auth.Failed(r.Context(), r.RemoteAddr, "auth.failure", p, "", "web login: "+err.Error())
		http.Redirect(w, r, "/login?failed=1", http.StatusSeeOther)
		return
	}
	sv.issueSession(w, r, tok)
	sv.cfg.Audit(r.Context(), p.Actor(), "auth.login", "", "web login with credential "+p.TokenID, r.RemoteAddr)
	http.Redirect(w, r, "/", http.StatusSeeOther)
}

func (sv *Server) handleLogout(w http.ResponseWriter, r *http.Request) {
	sv.clearSession(w, r)
	http.Redirect(w, r, "/login", http.StatusSeeOther)
}

// CheckSession reports why r's session cookie is not valid (nil when it is).
func (sv *Server) CheckSession(r *http.Request) error {
	_, err := sv.sessionFrom(r)
	return err
}
