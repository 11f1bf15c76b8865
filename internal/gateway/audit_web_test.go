package gateway

import (
	"context"
	"io"
	"net"
	"net/http"
	"net/http/cookiejar"
	neturl "net/url"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// alarmingDevice connects id and sends 10 s of SpO2 86 % (below the test
// profile's 90 % limit): its alarm is announced and can be acknowledged.
func alarmingDevice(t *testing.T, h *harness, id string) {
	t.Helper()
	d, _ := h.connect(t, summaryIntro(id))
	base := time.Now().Add(-time.Minute).UnixMilli()
	for s := uint64(1); s <= 10; s++ {
		d.send(summary(s, base+int64(s)*1000, 86))
	}
	d.waitAck(10)
}

// findAudit returns the newest entry of action for device.
func findAudit(t *testing.T, h *harness, action, device string) store.AuditEntry {
	t.Helper()
	es, err := h.db.Audit(0, action, 0)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range es {
		if e.Device == device {
			return e
		}
	}
	t.Fatalf("no %s entry for %s in %+v", action, device, es)
	return store.AuditEntry{}
}

// The acknowledgement note and the pause reason (documented "for the audit
// log" in fleet.proto) are in the audit log, and every entry names the
// caller's address, for gRPC and for the web page alike.
func TestAckNotesPauseReasonsAndAddressesAreAudited(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = webProfile(t) })
	alarmingDevice(t, h, "ward-n-01")
	alarmingDevice(t, h, "ward-n-02")
	ctx := context.Background()
	if _, err := h.fleet().AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{DeviceId: "ward-n-01", Note: "probe reseated"}); err != nil {
		t.Fatal(err)
	}
	if _, err := h.fleet().PauseAlarms(ctx, &pb.PauseAlarmsRequest{DeviceId: "ward-n-01", DurationS: 60, Reason: "walk to x-ray"}); err != nil {
		t.Fatal(err)
	}
	url := "http://" + h.httpAddr
	if code, body := webPost(t, url+"/api/device/ward-n-02/acknowledge", "application/json", url, `{"note":"seen at the bedside"}`); code != 200 {
		t.Fatalf("web ack: %d %s", code, body)
	}
	if code, body := webPost(t, url+"/api/device/ward-n-02/pause", "application/json", url, `{"duration_s":120,"reason":"family visit"}`); code != 200 {
		t.Fatalf("web pause: %d %s", code, body)
	}
	for _, c := range []struct{ action, device, want string }{
		{"alarm.acknowledged", "ward-n-01", "note: probe reseated"},
		{"alarm.paused", "ward-n-01", "reason: walk to x-ray"},
		{"alarm.acknowledged", "ward-n-02", "note: seen at the bedside"},
		{"alarm.paused", "ward-n-02", "reason: family visit"},
	} {
		e := findAudit(t, h, c.action, c.device)
		if !strings.Contains(e.Detail, c.want) {
			t.Errorf("%s of %s: detail %q lacks %q", c.action, c.device, e.Detail, c.want)
		}
		if host, _, err := net.SplitHostPort(e.Remote); err != nil || host != "127.0.0.1" {
			t.Errorf("%s of %s: remote %q, want the client's 127.0.0.1:PORT", c.action, c.device, e.Remote)
		}
	}
}

// The page's assets are served only after login, with the page's security
// headers, and the page's template never (only the filled-in page).
func TestUIAssetsNeedLoginAndCarryThePageHeaders(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = webProfile(t) })
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ui", Role: pb.Role_ROLE_ADMIN})
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-ui", Role: pb.Role_ROLE_VIEWER})
	url := "http://" + h.httpAddr
	get := func(c *http.Client, path string) (*http.Response, string) {
		t.Helper()
		resp, err := c.Get(url + path)
		if err != nil {
			t.Fatal(err)
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		return resp, string(b)
	}
	noRedirect := func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	anon := &http.Client{CheckRedirect: noRedirect}
	for _, p := range []string{"/ui/app.js", "/ui/app.css", "/ui/index.html", "/ui/"} {
		if resp, body := get(anon, p); resp.StatusCode != http.StatusUnauthorized || strings.Contains(body, "{{CSRF}}") {
			t.Errorf("%s without login: %d, want 401", p, resp.StatusCode)
		}
	}
	jar, _ := cookiejar.New(nil)
	c := &http.Client{Jar: jar, CheckRedirect: noRedirect}
	resp, err := c.PostForm(url+"/login", neturl.Values{"token": {viewer}})
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	page, _ := get(c, "/")
	for _, p := range []string{"/ui/app.js", "/ui/app.css"} {
		resp, _ := get(c, p)
		if resp.StatusCode != 200 {
			t.Errorf("%s after login: %d, want 200", p, resp.StatusCode)
		}
		for _, hd := range []string{"Content-Security-Policy", "X-Content-Type-Options", "Cache-Control"} {
			if got, want := resp.Header.Get(hd), page.Header.Get(hd); got != want || want == "" {
				t.Errorf("%s header %s: %q, want the page's %q", p, hd, got, want)
			}
		}
	}
	for _, p := range []string{"/ui/index.html", "/ui/", "/ui/./index.html"} {
		if resp, body := get(c, p); resp.StatusCode == 200 || strings.Contains(body, "{{CSRF}}") {
			t.Errorf("%s after login: %d, the template must not be served", p, resp.StatusCode)
		}
	}
}
