package gateway

import (
	"context"
	"fmt"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// bearer returns a context that sends tok as "authorization: Bearer tok".
func bearer(tok string) context.Context {
	if tok == "" {
		return context.Background()
	}
	return metadata.AppendToOutgoingContext(context.Background(), "authorization", "Bearer "+tok)
}

// openAs opens a device stream that presents tok.
func (h *harness) openAs(t testing.TB, tok string) *testDevice {
	t.Helper()
	ctx, cancel := context.WithCancel(bearer(tok))
	st, err := pb.NewIngestServiceClient(h.conn).Connect(ctx)
	if err != nil {
		t.Fatal(err)
	}
	d := &testDevice{t: t, stream: st, cancel: cancel, ch: make(chan struct{}, 1), ended: make(chan error, 1)}
	go d.read()
	t.Cleanup(d.close)
	return d
}

// endCode waits (bounded) for the stream to end and returns its status code.
func (d *testDevice) endCode() codes.Code {
	d.t.Helper()
	select {
	case err := <-d.ended:
		return status.Code(err)
	case <-time.After(20 * time.Second):
		d.t.Fatal("stream did not end")
	}
	return codes.Unknown
}

func (h *harness) admin() pb.AdminServiceClient { return pb.NewAdminServiceClient(h.conn) }

func issue(t testing.TB, h *harness, asTok string, req *pb.IssueTokenRequest) string {
	t.Helper()
	r, err := h.admin().IssueToken(bearer(asTok), req)
	if err != nil {
		t.Fatalf("issue %v: %v", req, err)
	}
	if !strings.HasPrefix(r.GetSecret(), "pf1_"+r.GetToken().GetTokenId()+"_") {
		t.Fatalf("secret does not start with its public id %s", r.GetToken().GetTokenId())
	}
	return r.GetSecret()
}

func tokenID(secret string) string { return strings.Split(secret, "_")[1] }

// The credential rules, each refusal audited with who, what and from where:
// no credential, a wrong one, a revoked one and a device streaming as another
// are refused; roles bound what each operator may do.
func TestCredentialsAndRoles(t *testing.T) {
	h := newHarness(t, nil)
	if err := h.g.SetSecurity(SecurityOptions{AuthAuditPerMinute: 1000}); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()

	// Open for development: no credential exists, the caller is on loopback.
	if !strings.Contains(h.g.AuthMode(), "OPEN") {
		t.Errorf("auth mode %q, want open", h.g.AuthMode())
	}
	if _, err := h.fleet().ListDevices(ctx, &pb.ListDevicesRequest{}); err != nil {
		t.Fatalf("open gateway refused a loopback call: %v", err)
	}
	// The first credential is issued anonymously; from then on tokens are required.
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	if !strings.Contains(h.g.AuthMode(), "tokens required") {
		t.Errorf("auth mode %q after the first credential", h.g.AuthMode())
	}
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-lu", Role: pb.Role_ROLE_VIEWER})
	operator := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "nurse-ilse", Role: pb.Role_ROLE_OPERATOR})
	devA := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "bed-a"})
	devB := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "bed-b"})
	if _, err := h.admin().RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: tokenID(devB)}); err != nil {
		t.Fatal(err)
	}
	// Secrets are stored hashed, never in clear.
	ts, err := h.admin().ListTokens(bearer(admin), &pb.ListTokensRequest{})
	if err != nil || len(ts.GetTokens()) != 5 {
		t.Fatalf("list tokens: %v %v", ts, err)
	}
	stored, _ := h.db.Tokens()
	for _, st := range stored {
		for _, sec := range []string{admin, viewer, operator, devA, devB} {
			if strings.Contains(fmt.Sprintf("%+v", st), sec) {
				t.Fatalf("a stored credential holds its secret: %+v", st)
			}
		}
	}

	base := time.Now().Add(-time.Minute).UnixMilli()
	// Device A streams as itself.
	a := h.openAs(t, devA)
	a.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-a")}})
	a.send(summary(1, base, 97))
	a.waitAck(1)

	calls := []struct {
		name string
		call func() error
		want codes.Code
	}{
		{"no credential", func() error { _, err := h.fleet().ListDevices(ctx, &pb.ListDevicesRequest{}); return err }, codes.Unauthenticated},
		{"wrong credential", func() error {
			_, err := h.fleet().ListDevices(bearer("pf1_000000000000_notavalidsecret"), &pb.ListDevicesRequest{})
			return err
		}, codes.Unauthenticated},
		{"revoked device credential streams", func() error {
			d := h.openAs(t, devB)
			_ = d.stream.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-b")}})
			return status.Error(d.endCode(), "")
		}, codes.Unauthenticated},
		{"device streams as another device", func() error {
			d := h.openAs(t, devA)
			d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-c")}})
			return status.Error(d.endCode(), "")
		}, codes.PermissionDenied},
		{"device credential reads the fleet", func() error {
			_, err := h.fleet().ListDevices(bearer(devA), &pb.ListDevicesRequest{})
			return err
		}, codes.PermissionDenied},
		{"viewer acknowledges", func() error {
			_, err := h.fleet().AcknowledgeAlarm(bearer(viewer), &pb.AcknowledgeAlarmRequest{DeviceId: "bed-a"})
			return err
		}, codes.PermissionDenied},
		{"viewer pauses", func() error {
			_, err := h.fleet().PauseAlarms(bearer(viewer), &pb.PauseAlarmsRequest{DeviceId: "bed-a", DurationS: 60})
			return err
		}, codes.PermissionDenied},
		{"viewer streams", func() error {
			d := h.openAs(t, viewer)
			return status.Error(d.endCode(), "")
		}, codes.PermissionDenied},
		{"operator changes a profile", func() error {
			_, err := h.fleet().SetAlarmProfile(bearer(operator), &pb.SetAlarmProfileRequest{ProfileYaml: "name: x"})
			return err
		}, codes.PermissionDenied},
		{"operator stores a calibration", func() error {
			_, err := h.admin().PutCalibration(bearer(operator), &pb.PutCalibrationRequest{CurveYaml: "name: x"})
			return err
		}, codes.PermissionDenied},
		{"operator issues a credential", func() error {
			_, err := h.admin().IssueToken(bearer(operator), &pb.IssueTokenRequest{Operator: "x", Role: pb.Role_ROLE_ADMIN})
			return err
		}, codes.PermissionDenied},
	}
	for _, c := range calls {
		if got := status.Code(c.call()); got != c.want {
			t.Errorf("%s: %v, want %v", c.name, got, c.want)
		}
	}

	// Allowed: the viewer reads, the operator acknowledges (there is nothing
	// to acknowledge: the answer is about the alarm, not the credential), the
	// admin streams as any device (simulators), health needs nothing.
	if _, err := h.fleet().ListDevices(bearer(viewer), &pb.ListDevicesRequest{}); err != nil {
		t.Errorf("viewer lists devices: %v", err)
	}
	if _, err := h.admin().ListAudit(bearer(viewer), &pb.ListAuditRequest{}); err != nil {
		t.Errorf("viewer reads the audit log: %v", err)
	}
	_, err = h.fleet().AcknowledgeAlarm(bearer(operator), &pb.AcknowledgeAlarmRequest{DeviceId: "bed-a"})
	if c := status.Code(err); c == codes.PermissionDenied || c == codes.Unauthenticated {
		t.Errorf("operator acknowledges: %v", err)
	}
	sim := h.openAs(t, admin)
	sim.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("sim-1")}})
	sim.send(summary(1, base, 96))
	sim.waitAck(1)
	if hc, err := healthpb.NewHealthClient(h.conn).Check(ctx, &healthpb.HealthCheckRequest{}); err != nil || hc.GetStatus() != healthpb.HealthCheckResponse_SERVING {
		t.Errorf("health without a credential: %v %v", hc, err)
	}

	// Revoking a device credential ends its open stream.
	if _, err := h.admin().RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: tokenID(devA)}); err != nil {
		t.Fatal(err)
	}
	if c := a.endCode(); c == codes.OK {
		t.Errorf("stream of a revoked device ended with %v", c)
	}

	// Every refusal is in the audit log with who, what and from where.
	au, err := h.admin().ListAudit(bearer(admin), &pb.ListAuditRequest{ActionPrefix: "auth."})
	if err != nil {
		t.Fatal(err)
	}
	var failures, denied int
	for _, e := range au.GetEntries() {
		if !strings.HasPrefix(e.GetRemote(), "127.0.0.1:") || e.GetTimeUnixMs() == 0 || e.GetDetail() == "" {
			t.Errorf("audit entry lacks where/when/what: %v", e)
		}
		switch e.GetAction() {
		case "auth.failure":
			failures++
		case "auth.denied":
			denied++
		}
	}
	if failures != 3 || denied != 8 {
		t.Errorf("audit: %d auth.failure (want 3: none, wrong, revoked), %d auth.denied (want 8)", failures, denied)
	}
	want := map[string]bool{"token.issue": false, "token.revoke": false}
	all, _ := h.admin().ListAudit(bearer(admin), &pb.ListAuditRequest{ActionPrefix: "token."})
	for _, e := range all.GetEntries() {
		want[e.GetAction()] = true
		if e.GetAction() == "token.issue" && e.GetActor() == "" {
			t.Errorf("token.issue without an actor: %v", e)
		}
	}
	for k, ok := range want {
		if !ok {
			t.Errorf("no %s entry in the audit log", k)
		}
	}
	// After a restart, the credentials still apply (loaded from the store).
	h.restart()
	if _, err := h.fleet().ListDevices(ctx, &pb.ListDevicesRequest{}); status.Code(err) != codes.Unauthenticated {
		t.Errorf("after restart, no credential: %v", err)
	}
	if _, err := h.fleet().ListDevices(bearer(viewer), &pb.ListDevicesRequest{}); err != nil {
		t.Errorf("after restart, viewer: %v", err)
	}
}

// RequireTokens closes a gateway that has no credential yet, and a
// non-loopback caller is never let in by the development rule.
func TestRequireTokensAndLocality(t *testing.T) {
	h := newHarness(t, nil)
	if err := h.g.SetSecurity(SecurityOptions{RequireTokens: true}); err != nil {
		t.Fatal(err)
	}
	if _, err := h.fleet().ListDevices(context.Background(), &pb.ListDevicesRequest{}); status.Code(err) != codes.Unauthenticated {
		t.Errorf("require tokens, none issued: %v", err)
	}
	if !strings.Contains(h.g.AuthMode(), "none is issued") {
		t.Errorf("mode %q", h.g.AuthMode())
	}
	for addr, local := range map[string]bool{"127.0.0.1:5": true, "[::1]:5": true, "10.0.0.7:5": false, "192.168.1.2:80": false, "bufconn": true} {
		if got := isLocal(fakeAddr(addr)); got != local {
			t.Errorf("isLocal(%s) = %v, want %v", addr, got, local)
		}
	}
}

type fakeAddr string

func (a fakeAddr) Network() string { return "test" }
func (a fakeAddr) String() string  { return string(a) }

// Refused calls are audited at most N per host per minute; the next entry
// counts the ones left out, so a flood cannot fill the disk.
func TestAuthFailureAuditIsRateLimited(t *testing.T) {
	var nowMS atomic.Int64
	nowMS.Store(time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli())
	h := newHarness(t, func(o *Options) { o.Now = func() time.Time { return time.UnixMilli(nowMS.Load()) } })
	if err := h.g.SetSecurity(SecurityOptions{RequireTokens: true, AuthAuditPerMinute: 5}); err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 50; i++ {
		h.fleet().ListDevices(context.Background(), &pb.ListDevicesRequest{})
	}
	nowMS.Add(61_000)
	h.fleet().ListDevices(context.Background(), &pb.ListDevicesRequest{})
	body := h.metrics(t)
	for _, want := range []string{`pulsefleet_auth_failures_total{reason="no_credential"} 51`, "pulsefleet_auth_audit_suppressed_total 45"} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}
	h.restart() // flushes the writer; the audit log is what the store holds
	es, err := h.db.Audit(0, "auth.failure", 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(es) != 6 {
		t.Fatalf("%d auth.failure entries, want 5 in the first minute and 1 after", len(es))
	}
	if !strings.Contains(es[0].Detail, "and 45 more refused calls") {
		t.Errorf("newest entry %q does not count the 45 left out", es[0].Detail)
	}
}

// Operator actions are audited under the credential's name: who comes from
// the token, not from anything the client claims.
func TestActionsAreAuditedUnderTheCredentialsName(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	nurse := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "nurse-ilse", Role: pb.Role_ROLE_OPERATOR})
	d := h.openAs(t, admin)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-p")}})
	d.send(summary(1, time.Now().Add(-time.Minute).UnixMilli(), 97))
	d.waitAck(1)
	ctx := metadata.AppendToOutgoingContext(bearer(nurse), "x-actor", "someone-else")
	if _, err := h.fleet().PauseAlarms(ctx, &pb.PauseAlarmsRequest{DeviceId: "bed-p", DurationS: 60, Reason: "repositioning"}); err != nil {
		t.Fatalf("operator pauses: %v", err)
	}
	if _, err := h.fleet().SetAlarmProfile(bearer(admin), &pb.SetAlarmProfileRequest{DeviceId: "bed-p", ProfileYaml: "name: quiet\nconditions:\n  - {kind: spo2_low, limit: 85, delay: 10s, priority: medium}\n", Reason: "trial"}); err != nil {
		t.Fatalf("admin sets a profile: %v", err)
	}
	h.restart()
	for action, who := range map[string]string{"alarm.paused": "nurse-ilse", "profile.set": "admin-ro", "token.issue": "anonymous"} {
		es, err := h.db.Audit(0, action, 0)
		if err != nil || len(es) == 0 {
			t.Errorf("%s: no audit entry (%v)", action, err)
			continue
		}
		if es[len(es)-1].Actor != who {
			t.Errorf("%s by %q, want %q", action, es[len(es)-1].Actor, who)
		}
	}
}

// A device credential holds at most a few streams at once: idle extra
// streams cannot pile up in the gateway's memory.
func TestDeviceCredentialStreamsAreBounded(t *testing.T) {
	h := newHarness(t, nil)
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	dev := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "bed-s"})
	for i := 0; i < maxDeviceStreams; i++ {
		h.openAs(t, dev) // open, never introduced
	}
	secWaitUntil(t, func() bool {
		return h.g.auth.OpenStreams(tokenID(dev)) == maxDeviceStreams
	}, "streams open")
	if c := h.openAs(t, dev).endCode(); c != codes.ResourceExhausted {
		t.Errorf("stream %d of one device credential: %v, want ResourceExhausted", maxDeviceStreams+1, c)
	}
	// An admin credential (simulators) is not bounded this way.
	for i := 0; i < 2*maxDeviceStreams; i++ {
		d := h.openAs(t, admin)
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro(fmt.Sprintf("sim-%d", i))}})
		d.waitFor(func() bool { return len(d.other) > 0 }, "welcome")
	}
}

// secWaitUntil polls cond (bounded) until it holds.
func secWaitUntil(t *testing.T, cond func() bool, what string) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// Revoking a credential ends the streams already open with it: an
// operator's watch as well as a device's stream.
func TestRevocationEndsOpenStreams(t *testing.T) {
	h := newHarness(t, nil)
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-ro", Role: pb.Role_ROLE_ADMIN})
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-lu", Role: pb.Role_ROLE_VIEWER})
	ctx, cancel := context.WithCancel(bearer(viewer))
	defer cancel()
	w, err := h.fleet().WatchEvents(ctx, &pb.WatchEventsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	ended := make(chan error, 1)
	go func() {
		for {
			if _, err := w.Recv(); err != nil {
				ended <- err
				return
			}
		}
	}()
	secWaitUntil(t, func() bool {
		return h.g.auth.OpenStreams(tokenID(viewer)) == 1
	}, "watch open")
	// A device streaming with its own credential.
	devTok := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "bed-rv"})
	dev := h.openAs(t, devTok)
	dev.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-rv")}})
	dev.waitFor(func() bool { return len(dev.other) > 0 }, "welcome")
	dev.send(summary(1, time.Now().Add(-time.Second).UnixMilli(), 97))
	dev.waitAck(1)
	if _, err := h.admin().RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: tokenID(viewer)}); err != nil {
		t.Fatal(err)
	}
	select {
	case err := <-ended:
		if status.Code(err) != codes.Unauthenticated {
			t.Errorf("watch of a revoked credential ended with %v, want Unauthenticated", err)
		}
	case <-time.After(20 * time.Second):
		t.Fatal("the watch of a revoked credential goes on")
	}
	if _, err := h.admin().RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: tokenID(devTok)}); err != nil {
		t.Fatal(err)
	}
	if c := dev.endCode(); c != codes.Unauthenticated {
		t.Errorf("device stream of a revoked credential ended with %v, want Unauthenticated", c)
	}
	// A new watch with it is refused (with the stream's first answer).
	w2, err := h.fleet().WatchEvents(bearer(viewer), &pb.WatchEventsRequest{})
	if err == nil {
		_, err = w2.Recv()
	}
	if status.Code(err) != codes.Unauthenticated {
		t.Errorf("new watch with a revoked credential: %v", err)
	}
}
