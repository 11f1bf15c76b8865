package gateway

import (
	"io"
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"crypto/tls"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// serveHTTP runs one request through the gateway's HTTP handler.
func serveHTTP(g *Gateway, r *http.Request) *http.Response {
	w := httptest.NewRecorder()
	g.httpHandler().ServeHTTP(w, r)
	return w.Result()
}

func loginReq(tok string, overTLS bool) *http.Request {
	r := httptest.NewRequest("POST", "/login", strings.NewReader(url.Values{"token": {tok}}.Encode()))
	r.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	r.Header.Set("Sec-Fetch-Site", "same-origin")
	r.RemoteAddr = "192.0.2.10:5000" // not loopback: no development exemption
	if overTLS {
		r.TLS = &tls.ConnectionState{}
	}
	return r
}

func withCookie(method, path string, c *http.Cookie) *http.Request {
	r := httptest.NewRequest(method, path, nil)
	r.RemoteAddr = "192.0.2.10:5000"
	if c != nil {
		r.AddCookie(c)
	}
	return r
}

// The web session: a cookie that is HttpOnly, SameSite=Strict and Secure
// over TLS, signed by the gateway (an altered one is refused), that expires,
// and that ends as soon as its credential is revoked. Device tokens and wrong
// tokens do not log in, and failed logins are audited.
func TestWebSessionCookie(t *testing.T) {
	var nowMS atomic.Int64
	nowMS.Store(time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli())
	h := newHarness(t, func(o *Options) { o.Now = func() time.Time { return time.UnixMilli(nowMS.Load()) } })
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	nurse := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "nurse-ilse", Role: pb.Role_ROLE_OPERATOR})
	dev := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "bed-1"})

	resp := serveHTTP(h.g, loginReq(nurse, true))
	if resp.StatusCode != http.StatusSeeOther || resp.Header.Get("Location") != "/" {
		t.Fatalf("login: %d to %q", resp.StatusCode, resp.Header.Get("Location"))
	}
	var c *http.Cookie
	for _, k := range resp.Cookies() {
		if k.Name == sessionCookie {
			c = k
		}
	}
	if c == nil || !c.HttpOnly || !c.Secure || c.SameSite != http.SameSiteStrictMode || c.Path != "/" || c.MaxAge != 12*3600 {
		t.Fatalf("session cookie %+v, want HttpOnly, Secure over TLS, SameSite=Strict, Path=/, 12 h", c)
	}
	if strings.Contains(c.Value, nurse) {
		t.Fatal("the session cookie holds the token itself")
	}
	if k := serveHTTP(h.g, loginReq(nurse, false)).Cookies(); len(k) != 1 || k[0].Secure {
		t.Errorf("cookie over plain HTTP: %+v, want not Secure (the browser would drop it)", k)
	}

	if code := serveHTTP(h.g, withCookie("GET", "/api/fleet", c)).StatusCode; code != http.StatusOK {
		t.Errorf("fleet with the session: %d", code)
	}
	// Altered cookies: another expiry, another credential hash, a cut signature.
	parts := strings.Split(c.Value, ".")
	for name, v := range map[string]string{
		"later expiry": strings.Join([]string{parts[0], parts[1], "99999999999999", parts[3], parts[4]}, "."),
		"other hash":   strings.Join([]string{parts[0], strings.Repeat("0", 64), parts[2], parts[3], parts[4]}, "."),
		"no signature": strings.Join(parts[:4], ".") + ".",
	} {
		if code := serveHTTP(h.g, withCookie("GET", "/api/fleet", &http.Cookie{Name: sessionCookie, Value: v})).StatusCode; code != http.StatusUnauthorized {
			t.Errorf("%s: %d, want 401", name, code)
		}
	}
	// An unsafe request with the cookie needs the CSRF token.
	if code := serveHTTP(h.g, withCookie("POST", "/logout", c)).StatusCode; code != http.StatusForbidden {
		t.Errorf("logout without the CSRF token: %d, want 403", code)
	}
	r := withCookie("POST", "/logout", c)
	r.Header.Set("X-CSRF-Token", h.g.webCSRFToken(withCookie("GET", "/", c)))
	if resp := serveHTTP(h.g, r); resp.StatusCode != http.StatusSeeOther || resp.Cookies()[0].MaxAge >= 0 {
		t.Errorf("logout with the CSRF token: %d %+v", resp.StatusCode, resp.Cookies())
	}

	// Expiry (the gateway clock moves 12 h and a second).
	nowMS.Add((12*3600 + 1) * 1000)
	if code := serveHTTP(h.g, withCookie("GET", "/api/fleet", c)).StatusCode; code != http.StatusUnauthorized {
		t.Errorf("expired session: %d, want 401", code)
	}
	// Revocation ends a fresh session at once.
	resp = serveHTTP(h.g, loginReq(nurse, false))
	c = resp.Cookies()[0]
	if code := serveHTTP(h.g, withCookie("GET", "/api/fleet", c)).StatusCode; code != http.StatusOK {
		t.Fatalf("new session: %d", code)
	}
	if _, err := h.admin().RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: tokenID(nurse)}); err != nil {
		t.Fatal(err)
	}
	if code := serveHTTP(h.g, withCookie("GET", "/api/fleet", c)).StatusCode; code != http.StatusUnauthorized {
		t.Errorf("session of a revoked credential: %d, want 401", code)
	}
	// Refused logins: a revoked, a device and a wrong token.
	for _, tok := range []string{nurse, dev, "pf1_nope"} {
		resp := serveHTTP(h.g, loginReq(tok, false))
		if resp.StatusCode != http.StatusSeeOther || resp.Header.Get("Location") != "/login?failed=1" || len(resp.Cookies()) != 0 {
			t.Errorf("login with %.12s...: %d to %q, cookies %v", tok, resp.StatusCode, resp.Header.Get("Location"), resp.Cookies())
		}
	}
	// A cross-site login form post is refused outright.
	xs := loginReq(admin, false)
	xs.Header.Set("Sec-Fetch-Site", "cross-site")
	if code := serveHTTP(h.g, xs).StatusCode; code != http.StatusForbidden {
		t.Errorf("cross-site login: %d, want 403", code)
	}
	// Bearer headers (scripts) need no CSRF token.
	r = httptest.NewRequest("GET", "/api/fleet", nil)
	r.RemoteAddr = "192.0.2.10:5000"
	r.Header.Set("Authorization", "Bearer "+admin)
	if code := serveHTTP(h.g, r).StatusCode; code != http.StatusOK {
		t.Errorf("bearer header: %d", code)
	}
	h.restart()
	es, err := h.db.Audit(0, "auth.", 0)
	if err != nil {
		t.Fatal(err)
	}
	var logins, failures int
	for _, e := range es {
		switch e.Action {
		case "auth.login":
			logins++
		case "auth.failure":
			if strings.Contains(e.Detail, "web login") {
				failures++
			}
			if e.Remote != "192.0.2.10:5000" {
				t.Errorf("failure from %q, want the client's address", e.Remote)
			}
		}
	}
	if logins != 3 || failures != 3 {
		t.Errorf("audit: %d logins (want 3), %d failed web logins (want 3)", logins, failures)
	}
}

// The page's event stream, opened with a session, ends when the session's
// credential is revoked.
func TestWebEventStreamEndsOnRevocation(t *testing.T) {
	h := newHarness(t, nil)
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-lu", Role: pb.Role_ROLE_VIEWER})
	c := serveHTTP(h.g, loginReq(viewer, false)).Cookies()[0]
	req, err := http.NewRequest("GET", "http://"+h.httpAddr+"/api/events", nil)
	if err != nil {
		t.Fatal(err)
	}
	req.AddCookie(c)
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("events: %d", resp.StatusCode)
	}
	done := make(chan struct{})
	go func() { io.Copy(io.Discard, resp.Body); close(done) }()
	secWaitUntil(t, func() bool {
		return h.g.auth.OpenStreams(tokenID(viewer)) == 1
	}, "event stream open")
	if _, err := h.admin().RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: tokenID(viewer)}); err != nil {
		t.Fatal(err)
	}
	select {
	case <-done:
	case <-time.After(20 * time.Second):
		t.Fatal("the event stream of a revoked credential goes on")
	}
}
