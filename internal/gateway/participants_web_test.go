package gateway

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"
	"time"
)

// The page's enrolment JSON with tokens issued: a viewer reads a device's
// enrolments but cannot enrol or end; an operator enrols only with the
// session's CSRF token and the page's JSON content type; the gateway's
// messages (PID rule, overlap) come back unchanged; the enrolment, its end
// and their audit entries carry the operator's name.
func TestWebEnrolmentRolesAndCSRF(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = webProfile(t) })
	d, _ := h.connect(t, summaryIntro("ward-e-01"))
	d.send(summary(1, time.Now().Add(-time.Minute).UnixMilli(), 97))
	d.waitAck(1)
	_, viewer, operator := webRoles(t, h)
	url := "http://" + h.httpAddr
	post := func(c *http.Client, path, csrf, ctype, body string) (int, string) {
		t.Helper()
		return sessionPost(t, c, url+"/api/device/ward-e-01/"+path, csrf, ctype, body)
	}
	const good = `{"participant":"P-0042","note":"bed 4"}`
	vc, vcsrf := webLogin(t, url, viewer)
	if c, _ := post(vc, "enrol", vcsrf, "application/json", good); c != http.StatusForbidden {
		t.Errorf("viewer enrols: %d, want 403", c)
	}
	oc, ocsrf := webLogin(t, url, operator)
	if c, _ := post(oc, "enrol", "", "application/json", good); c != http.StatusForbidden {
		t.Errorf("operator without the CSRF token: %d, want 403", c)
	}
	if c, _ := post(oc, "enrol", ocsrf, "text/plain", good); c != http.StatusBadRequest {
		t.Errorf("operator with a form content type: %d, want 400", c)
	}
	if c, b := post(oc, "enrol", ocsrf, "application/json", `{"participant":"smith"}`); c != http.StatusBadRequest || !strings.Contains(b, "never a name") {
		t.Errorf("a name: %d %s, want 400 with the PID rule", c, b)
	}
	if c, b := post(oc, "enrol", ocsrf, "application/json", good); c != http.StatusOK || !strings.Contains(b, `"created_by":"nurse-web"`) || !strings.Contains(b, `"participant_id":"P-0042"`) {
		t.Fatalf("operator with the CSRF token: %d %s, want 200 by nurse-web", c, b)
	}
	if c, b := post(oc, "enrol", ocsrf, "application/json", `{"participant":"P-0043"}`); c != http.StatusConflict || !strings.Contains(b, "already enrolled to P-0042") || !strings.Contains(b, "overlaps") {
		t.Errorf("overlap: %d %s, want 409 naming both intervals", c, b)
	}
	if c, b := post(oc, "enrolment/end", ocsrf, "application/json", `{}`); c != http.StatusBadRequest || !strings.Contains(b, "participant: required") {
		t.Errorf("end without the participant: %d %s, want 400", c, b)
	}
	if c, _ := post(vc, "enrolment/end", vcsrf, "application/json", `{"participant":"P-0042"}`); c != http.StatusForbidden {
		t.Errorf("viewer ends: %d, want 403", c)
	}
	time.Sleep(5 * time.Millisecond) // the end (now) must lie after the start
	if c, b := post(oc, "enrolment/end", ocsrf, "application/json", `{"participant":"P-0042"}`); c != http.StatusOK || !strings.Contains(b, `"to_unix_ms"`) {
		t.Errorf("operator ends: %d %s", c, b)
	}
	resp, err := vc.Get(url + "/api/device/ward-e-01/enrolments")
	if err != nil {
		t.Fatal(err)
	}
	var got struct {
		Enrolments []struct {
			Participant string `json:"participant_id"`
			Note        string `json:"note"`
			To          string `json:"to_unix_ms"`
			By          string `json:"created_by"`
		} `json:"enrolments"`
	}
	err = json.NewDecoder(resp.Body).Decode(&got)
	resp.Body.Close()
	if err != nil || len(got.Enrolments) != 1 || got.Enrolments[0].Participant != "P-0042" || got.Enrolments[0].Note != "bed 4" ||
		got.Enrolments[0].To == "" || got.Enrolments[0].By != "nurse-web" {
		t.Errorf("viewer reads %+v (%v), want one ended enrolment of P-0042 by nurse-web", got, err)
	}
	for _, action := range []string{"participants.enrol", "participants.end"} {
		au, _ := h.db.Audit(0, action, 0)
		if len(au) != 1 || au[0].Actor != "nurse-web" || !strings.Contains(au[0].Detail, "P-0042") {
			t.Errorf("audit %s: %+v, want one entry by nurse-web", action, au)
		}
	}
}
