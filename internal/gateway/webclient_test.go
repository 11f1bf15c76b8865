package gateway

import (
	"io"
	"net/http"
	"net/http/cookiejar"
	neturl "net/url"
	"regexp"
	"strings"
	"testing"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// webRoles issues the tokens of the page's role tests: an admin
// ("admin-web"), a viewer ("viewer-web") and an operator ("nurse-web").
func webRoles(t testing.TB, h *harness) (admin, viewer, operator string) {
	t.Helper()
	admin = issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-web", Role: pb.Role_ROLE_ADMIN})
	viewer = issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-web", Role: pb.Role_ROLE_VIEWER})
	operator = issue(t, h, admin, &pb.IssueTokenRequest{Operator: "nurse-web", Role: pb.Role_ROLE_OPERATOR})
	return admin, viewer, operator
}

var csrfMeta = regexp.MustCompile(`<meta name="csrf-token" content="([^"]+)">`)

// webLogin logs in to the page at base (http://host:port) with a token and
// returns a client holding the session cookie (it follows no redirect) and
// the CSRF token of the page it then loads.
func webLogin(t testing.TB, base, tok string) (*http.Client, string) {
	t.Helper()
	jar, _ := cookiejar.New(nil)
	c := &http.Client{Jar: jar, CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	resp, err := c.PostForm(base+"/login", neturl.Values{"token": {tok}})
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	resp, err = c.Get(base + "/")
	if err != nil {
		t.Fatal(err)
	}
	page, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	m := csrfMeta.FindSubmatch(page)
	if resp.StatusCode != http.StatusOK || m == nil {
		t.Fatalf("page after login: %d, CSRF meta tag found %v", resp.StatusCode, m != nil)
	}
	return c, string(m[1])
}

// sessionPost posts body to url through a logged-in client with the content
// type and, unless csrf is "", the CSRF header, as the page's writes do; it
// returns the status and body.
func sessionPost(t testing.TB, c *http.Client, url, csrf, ctype, body string) (int, string) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodPost, url, strings.NewReader(body))
	req.Header.Set("Content-Type", ctype)
	if csrf != "" {
		req.Header.Set("X-CSRF-Token", csrf)
	}
	resp, err := c.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}
