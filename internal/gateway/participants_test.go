package gateway

import (
	"bytes"
	"encoding/json"
	"io"
	"net/http"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// sendNight streams 60 one-second summaries from device id at device times
// t0, t0+1 s, ..., t0+59 s: SpO2 97 %, except 85 % at seconds 10..24, which
// the test profile (spo2_low at 90 %, 3 s delay) turns into one episode
// with its onset near second 10.
func sendNight(t *testing.T, h *harness, tok, id string, t0 int64) {
	t.Helper()
	d := h.openAs(t, tok)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro(id)}})
	for i := int64(0); i < 60; i++ {
		spo2 := 97.0
		if i >= 10 && i < 25 {
			spo2 = 85
		}
		d.send(summary(uint64(i+1), t0+i*1000, spo2))
	}
	d.waitAck(60)
	d.close()
}

func getJSON(t *testing.T, h *harness, tok, path string) []byte {
	t.Helper()
	req, _ := http.NewRequest("GET", "http://"+h.httpAddr+path, nil)
	req.Header.Set("Authorization", "Bearer "+tok)
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	if resp.StatusCode != 200 {
		t.Fatalf("GET %s: %d %s", path, resp.StatusCode, b)
	}
	return b
}

// Enrolment roles, the overlap refusal over the API, and withdrawal: after
// DeleteParticipant no read path returns the participant's points, the
// audit holds the deletion, and the other participant's data are byte for
// byte what they were.
func TestParticipantsEnrolAndDelete(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	nurse := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "nurse-ilse", Role: pb.Role_ROLE_OPERATOR})
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-lu", Role: pb.Role_ROLE_VIEWER})
	devA := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "OX-A"})
	devB := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "OX-B"})
	t0 := (time.Now().UnixMilli()/1000 - 300) * 1000
	sendNight(t, h, devA, "OX-A", t0)
	sendNight(t, h, devB, "OX-B", t0)

	pc := pb.NewParticipantServiceClient(h.conn)
	enrol := func(tok, pid, dev string, from, to int64) (*pb.EnrolResponse, error) {
		return pc.Enrol(bearer(tok), &pb.EnrolRequest{Enrolment: &pb.Enrolment{ParticipantId: pid, DeviceId: dev, FromUnixMs: from, ToUnixMs: to, Note: "pilot"}})
	}
	if _, err := enrol(viewer, "P-0001", "OX-A", t0, t0+30_000); status.Code(err) != codes.PermissionDenied {
		t.Errorf("viewer enrols: %v, want PermissionDenied", err)
	}
	// P-0001 holds OX-A for the first 30 s (points 0..29, the episode's
	// onset at about second 13); P-0002 holds OX-B from t0, open.
	if _, err := enrol(nurse, "P-0001", "OX-A", t0, t0+30_000); err != nil {
		t.Fatal(err)
	}
	if _, err := enrol(nurse, "P-0002", "OX-B", t0, 0); err != nil {
		t.Fatal(err)
	}
	_, err := enrol(nurse, "P-0003", "OX-A", t0+20_000, 0)
	if status.Code(err) != codes.FailedPrecondition || !strings.Contains(err.Error(), "already enrolled to P-0001") {
		t.Errorf("overlap: %v", err)
	}
	if _, err := enrol(nurse, "Maria", "OX-C", t0, 0); status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "participant") {
		t.Errorf("a name as participant id: %v", err)
	}
	list, err := pc.ListEnrolments(bearer(viewer), &pb.ListEnrolmentsRequest{})
	if err != nil || len(list.GetEnrolments()) != 2 || list.GetEnrolments()[0].GetCreatedBy() != "nurse-ilse" {
		t.Fatalf("list: %v %v", list, err)
	}

	// The page shows who holds each device now: OX-B P-0002 (open); OX-A
	// nobody (P-0001's enrolment ended 30 s after t0, minutes ago).
	var fleet struct {
		Devices []struct {
			Device struct {
				DeviceID string `json:"device_id"`
			} `json:"device"`
			Participant string `json:"participant"`
		} `json:"devices"`
	}
	if err := json.Unmarshal(getJSON(t, h, viewer, "/api/fleet?spark=0"), &fleet); err != nil {
		t.Fatal(err)
	}
	held := map[string]string{}
	for _, d := range fleet.Devices {
		held[d.Device.DeviceID] = d.Participant
	}
	if len(held) != 2 || held["OX-B"] != "P-0002" || held["OX-A"] != "" {
		t.Errorf("page participants %v, want OX-B P-0002 and OX-A none", held)
	}
	var dev struct{ Participant string }
	if err := json.Unmarshal(getJSON(t, h, viewer, "/api/device/OX-B"), &dev); err != nil || dev.Participant != "P-0002" {
		t.Errorf("device page participant %q %v", dev.Participant, err)
	}

	// What P-0002 (OX-B) reads before, to compare byte for byte after.
	snapshotB := func() []byte {
		var buf bytes.Buffer
		tr, err := h.fleet().QueryTrend(bearer(viewer), &pb.QueryTrendRequest{DeviceId: "OX-B", FromUnixMs: t0 - 60_000, ToUnixMs: t0 + 120_000})
		if err != nil {
			t.Fatal(err)
		}
		b, _ := proto.MarshalOptions{Deterministic: true}.Marshal(tr)
		buf.Write(b)
		eps, err := h.fleet().ListEpisodes(bearer(viewer), &pb.ListEpisodesRequest{DeviceId: "OX-B"})
		if err != nil {
			t.Fatal(err)
		}
		b, _ = proto.MarshalOptions{Deterministic: true}.Marshal(eps)
		buf.Write(b)
		return buf.Bytes()
	}
	before := snapshotB()
	if eps, _ := h.fleet().ListEpisodes(bearer(viewer), &pb.ListEpisodesRequest{DeviceId: "OX-A"}); len(eps.GetEpisodes()) != 1 {
		t.Fatalf("OX-A episodes before: %v, want 1", eps)
	}

	// Deletion: admin only, with confirm, and not while an enrolment is open.
	del := func(tok, pid string, confirm bool) (*pb.DeleteParticipantResponse, error) {
		return pc.DeleteParticipant(bearer(tok), &pb.DeleteParticipantRequest{ParticipantId: pid, Confirm: confirm})
	}
	if _, err := del(nurse, "P-0001", true); status.Code(err) != codes.PermissionDenied {
		t.Errorf("operator deletes: %v", err)
	}
	if _, err := del(admin, "P-0001", false); status.Code(err) != codes.InvalidArgument {
		t.Errorf("delete without confirm: %v", err)
	}
	if _, err := del(admin, "P-0002", true); status.Code(err) != codes.FailedPrecondition || !strings.Contains(err.Error(), "end it first") {
		t.Errorf("delete with an open enrolment: %v", err)
	}
	resp, err := del(admin, "P-0001", true)
	if err != nil {
		t.Fatal(err)
	}
	// 30 points (seconds 0..29) and the one episode (onset in 10..13 s).
	if resp.GetTrendPoints() != 30 || resp.GetEpisodes() != 1 || len(resp.GetEnrolments()) != 1 {
		t.Errorf("deleted %v, want 30 trend points and 1 episode in 1 enrolment", resp)
	}

	// Every read path of OX-A in P-0001's interval is empty now.
	tr, err := h.fleet().QueryTrend(bearer(viewer), &pb.QueryTrendRequest{DeviceId: "OX-A", FromUnixMs: t0 - 60_000, ToUnixMs: t0 + 120_000})
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range tr.GetPoints() {
		if p.GetTimeUnixMs() < t0+30_000 {
			t.Errorf("QueryTrend returns a deleted point at +%d ms", p.GetTimeUnixMs()-t0)
		}
	}
	if len(tr.GetPoints()) != 30 {
		t.Errorf("OX-A keeps %d points, want the 30 after P-0001's interval", len(tr.GetPoints()))
	}
	st, err := h.fleet().ExportTrend(bearer(viewer), &pb.ExportTrendRequest{DeviceIds: []string{"OX-A"}})
	if err != nil {
		t.Fatal(err)
	}
	for {
		m, err := st.Recv()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		for _, p := range m.GetPoints() {
			if p.GetTimeUnixMs() < t0+30_000 {
				t.Errorf("ExportTrend returns a deleted point at +%d ms", p.GetTimeUnixMs()-t0)
			}
		}
	}
	if eps, _ := h.fleet().ListEpisodes(bearer(viewer), &pb.ListEpisodesRequest{DeviceId: "OX-A"}); len(eps.GetEpisodes()) != 0 {
		t.Errorf("OX-A episodes after: %v", eps)
	}
	var web struct {
		Buckets []struct {
			StartMS int64 `json:"start_ms"`
		} `json:"buckets"`
	}
	if err := json.Unmarshal(getJSON(t, h, viewer, "/api/device/OX-A/trend?minutes=30&step_s=1"), &web); err != nil {
		t.Fatal(err)
	}
	for _, b := range web.Buckets {
		if b.StartMS >= t0-1000 && b.StartMS < t0+29_000 {
			t.Errorf("web trend has a bucket at +%d ms inside the deleted interval", b.StartMS-t0)
		}
	}
	if after := snapshotB(); !bytes.Equal(before, after) {
		t.Errorf("P-0002's data changed: %d bytes before, %d after", len(before), len(after))
	}
	if l, _ := pc.ListEnrolments(bearer(viewer), &pb.ListEnrolmentsRequest{ParticipantId: "P-0001"}); len(l.GetEnrolments()) != 0 {
		t.Errorf("P-0001's enrolments survive: %v", l)
	}
	a, err := h.admin().ListAudit(bearer(admin), &pb.ListAuditRequest{ActionPrefix: "participants.delete"})
	if err != nil || len(a.GetEntries()) != 1 || a.GetEntries()[0].GetActor() != "admin-ro" ||
		!strings.Contains(a.GetEntries()[0].GetDetail(), "participant P-0001 withdrawn: deleted 30 trend points, 0 raw captures, 1 episodes") {
		t.Errorf("audit: %v %v", a, err)
	}
	if a.GetEntries()[0].GetAuditId() != resp.GetAuditId() {
		t.Errorf("response names audit entry %d, the log %d", resp.GetAuditId(), a.GetEntries()[0].GetAuditId())
	}
	// The deletion survives a restart (nothing comes back from the recent log).
	h.restart()
	tr, err = h.fleet().QueryTrend(bearer(viewer), &pb.QueryTrendRequest{DeviceId: "OX-A", FromUnixMs: t0 - 60_000, ToUnixMs: t0 + 30_000})
	if err != nil || len(tr.GetPoints()) != 0 {
		t.Errorf("after restart %d deleted points are back", len(tr.GetPoints()))
	}
}
