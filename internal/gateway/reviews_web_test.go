package gateway

import (
	"encoding/json"
	"net/http"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// The page's review JSON with tokens issued: a viewer reads reviews but
// cannot review; an operator reviews only with the session's CSRF token and
// the page's JSON content type; bad labels are named; the stored review and
// its audit entry carry the operator's name.
func TestWebReviewRolesAndCSRF(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = webProfile(t) })
	d, _ := h.connect(t, summaryIntro("ward-v-01"))
	base := time.Now().Add(-time.Minute).UnixMilli()
	for s := uint64(1); s <= 10; s++ {
		d.send(summary(s, base+int64(s)*1000, 86)) // below 90 % for 10 s: announced after 2 s
	}
	d.waitAck(10)
	var epID uint64
	waitUntil(t, func() bool {
		eps, _ := h.db.Episodes(store.EpisodeFilter{Device: "ward-v-01"})
		if len(eps) > 0 && eps[0].ID != 0 {
			epID = eps[0].ID
			return true
		}
		return false
	}, "a stored episode")
	_, viewer, operator := webRoles(t, h)
	url := "http://" + h.httpAddr
	post := func(c *http.Client, csrf, ctype, body string) (int, string) {
		t.Helper()
		return sessionPost(t, c, url+"/api/episode/"+strconv.FormatUint(epID, 10)+"/review", csrf, ctype, body)
	}
	const good = `{"label":"not-actionable","note":"asleep, recovered at once"}`
	vc, vcsrf := webLogin(t, url, viewer)
	if c, _ := post(vc, vcsrf, "application/json", good); c != http.StatusForbidden {
		t.Errorf("viewer reviews: %d, want 403", c)
	}
	oc, ocsrf := webLogin(t, url, operator)
	if c, _ := post(oc, "", "application/json", good); c != http.StatusForbidden {
		t.Errorf("operator without the CSRF token: %d, want 403", c)
	}
	if c, _ := post(oc, ocsrf, "text/plain", good); c != http.StatusBadRequest {
		t.Errorf("operator with a form content type: %d, want 400", c)
	}
	if c, b := post(oc, ocsrf, "application/json", `{"label":"fine"}`); c != http.StatusBadRequest || !strings.Contains(b, `label: \"fine\", want one of`) {
		t.Errorf("bad label: %d %s, want 400 naming the field", c, b)
	}
	if c, b := post(oc, ocsrf, "application/json", good); c != http.StatusOK || !strings.Contains(b, `"reviewer":"nurse-web"`) {
		t.Fatalf("operator with the CSRF token: %d %s, want 200 by nurse-web", c, b)
	}
	resp, err := vc.Get(url + "/api/device/ward-v-01/reviews")
	if err != nil {
		t.Fatal(err)
	}
	var got struct {
		Labels  []struct{ Label, Meaning string } `json:"labels"`
		Reviews map[string]struct {
			Label    string `json:"label"`
			Reviewer string `json:"reviewer"`
			Revision uint32 `json:"revision"`
		} `json:"reviews"`
	}
	err = json.NewDecoder(resp.Body).Decode(&got)
	resp.Body.Close()
	r := got.Reviews[strconv.FormatUint(epID, 10)]
	if err != nil || len(got.Labels) != 4 || got.Labels[0].Meaning == "" || r.Label != "not-actionable" || r.Reviewer != "nurse-web" || r.Revision != 1 {
		t.Errorf("viewer reads %+v (%v), want the four labels with meanings and the review by nurse-web", got, err)
	}
	au, _ := h.db.Audit(0, "episode.review", 0)
	if len(au) != 1 || au[0].Actor != "nurse-web" || !strings.Contains(au[0].Detail, "not-actionable; note: asleep, recovered at once") {
		t.Errorf("audit %+v, want one episode.review by nurse-web with label and note", au)
	}
}
