package gateway

import (
	"context"
	"errors"
	"fmt"
	"math"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/store"
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

// Over the message-rate limit a stream gets REJECT_REASON_RATE_LIMITED for
// each message over it and goes on; what it resends later is stored.
func TestRateLimitRejectsAndStreamGoesOn(t *testing.T) {
	var nowMS atomic.Int64 // a stopped clock: the bucket refills only when the test moves it
	nowMS.Store(time.Date(2026, 11, 30, 22, 0, 0, 0, time.UTC).UnixMilli())
	h := newHarness(t, func(o *Options) { o.Now = func() time.Time { return time.UnixMilli(nowMS.Load()) } })
	if err := h.g.SetSecurity(SecurityOptions{DeviceRate: 10, DeviceBurst: 20}); err != nil {
		t.Fatal(err)
	}
	base := nowMS.Load() - 60_000
	d, _ := h.connect(t, summaryIntro("fast-1"))
	for s := uint64(1); s <= 30; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	rejs := d.waitRejections(10)
	for i, r := range rejs {
		if r.GetReason() != pb.RejectReason_REJECT_REASON_RATE_LIMITED || r.GetSequence() != uint64(21+i) {
			t.Errorf("rejection %d: %v, want RATE_LIMITED for sequence %d", i, r, 21+i)
		}
	}
	d.waitAck(20)
	nowMS.Add(1000) // 10 more tokens
	// A later message may not overtake the refused one: 22 before 21 is
	// refused too (else 21 would count as lost and its resend as stale).
	d.send(summary(22, base+22000, 95))
	if r := d.waitRejections(11)[10]; r.GetReason() != pb.RejectReason_REJECT_REASON_RATE_LIMITED || r.GetSequence() != 22 || !strings.Contains(r.GetDetail(), "resend from sequence 21") {
		t.Errorf("22 before 21: %v, want RATE_LIMITED naming 21", r)
	}
	for s := uint64(21); s <= 30; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	d.waitAck(30)
	lost := func() uint64 {
		q, err := h.g.GetDeviceQuality(context.Background(), &pb.GetDeviceQualityRequest{DeviceId: "fast-1"})
		if err != nil {
			t.Fatal(err)
		}
		return q.GetQuality().GetChunksLost()
	}
	if n := lost(); n != 0 {
		t.Errorf("%d messages counted lost, want 0", n)
	}
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if lt := tot["fast-1"]; lt.Chunks != 30 || !lt.Distinct || lt.MaxSeq != 30 {
		t.Errorf("ledger %+v, want 30 distinct messages", lt)
	}

	// A device that gives a refused message up is held back only so long:
	// after rateHoldMS its later messages are taken (the gap counts as lost).
	nowMS.Add(1000) // 10 more tokens
	for s := uint64(31); s <= 60; s++ {
		d.send(summary(s, base+int64(s)*1000, 95))
	}
	d.waitRejections(11 + 20) // 31..40 taken, 41 refused (no tokens), 42..60 held
	d.send(summary(42, base+42000, 95))
	d.waitRejections(11 + 21) // still held
	nowMS.Add(rateHoldMS + 1)
	d.send(summary(43, base+43000, 95))
	d.waitAck(43)
	if n := lost(); n != 2 {
		t.Errorf("%d messages counted lost, want 2 (41 and 42, given up)", n)
	}
}

// One stream per device: a second stream replaces the first (which ends
// with ABORTED), and the replacement is audited.
func TestSecondStreamReplacesFirst(t *testing.T) {
	h := newHarness(t, nil)
	base := time.Now().Add(-time.Minute).UnixMilli()
	first, _ := h.connect(t, summaryIntro("bed-r"))
	first.send(summary(1, base, 97))
	first.waitAck(1)
	second, w := h.connect(t, summaryIntro("bed-r"))
	if c := first.endCode(); c != codes.Aborted {
		t.Errorf("replaced stream ended with %v, want Aborted", c)
	}
	if w.GetResumeAfterSequence() != 1 {
		t.Errorf("second stream resumes after %d, want 1", w.GetResumeAfterSequence())
	}
	second.send(summary(2, base+1000, 97))
	second.waitAck(2)
	h.restart()
	es, _ := h.db.Audit(0, "stream.replace", 0)
	if len(es) != 1 || es[0].Device != "bed-r" || es[0].Actor != "device:bed-r" {
		t.Errorf("audit: %+v, want one stream.replace of bed-r", es)
	}
}

// A panic while serving a stream ends only that stream (INTERNAL); it is
// counted, the gateway stays ready, and the device resumes where it was.
func TestPanicInStreamIsRecovered(t *testing.T) {
	// The fault is a calibration resolver that panics for one reference: a
	// defect in code a stream calls.
	h := newHarness(t, func(o *Options) {
		o.ResolveCalibration = func(name string, redNM, irNM float64) (estimator.Calibration, string, error) {
			if name == "injected-fault" {
				panic("injected fault")
			}
			return calibration.Resolve(name, redNM, irNM, nil)
		}
	})
	base := time.Now().Add(-time.Minute).UnixMilli()
	other, _ := h.connect(t, summaryIntro("calm-1"))
	d, _ := h.connect(t, summaryIntro("boom-1"))
	d.send(summary(1, base, 97))
	d.send(summary(2, base+1000, 97))
	d.waitAck(2)
	in := rawIntro("boom-1", 16)
	in.CalibrationId = "injected-fault"
	boom := h.open(t)
	boom.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: in}})
	if c := boom.endCode(); c != codes.Internal {
		t.Errorf("panicking stream ended with %v, want Internal", c)
	}
	if !h.g.Ready() {
		t.Error("gateway not ready after a stream panicked")
	}
	other.send(summary(1, base, 98))
	other.waitAck(1)
	d2, w := h.connect(t, summaryIntro("boom-1"))
	if w.GetResumeAfterSequence() != 2 {
		t.Errorf("resume after %d, want 2", w.GetResumeAfterSequence())
	}
	d2.send(summary(3, base+2000, 97))
	d2.waitAck(3)
	if body := h.metrics(t); !strings.Contains(body, "pulsefleet_stream_panics_total 1") {
		t.Error("/metrics does not count the panic")
	}
}

// rawCodec sends bytes as they are, so a client can send what no honest
// encoder would.
type rawCodec struct{}

func (rawCodec) Marshal(v any) ([]byte, error) {
	if b, ok := v.(*[]byte); ok {
		return *b, nil
	}
	return nil, errors.New("rawCodec: want *[]byte")
}
func (rawCodec) Unmarshal(data []byte, v any) error {
	if b, ok := v.(*[]byte); ok {
		*b = append((*b)[:0], data...)
		return nil
	}
	return errors.New("rawCodec: want *[]byte")
}
func (rawCodec) Name() string { return "proto" } // the server decodes it as protobuf

// 10,000 malformed messages from many connections (garbage bytes, data
// before an introduction, invalid and oversized chunks, wrong credentials)
// while 20 honest devices stream: every acknowledged honest message is stored
// exactly once, the gateway keeps serving, and the refused credentials fill
// the audit log by at most the per-host limit.
func TestFloodOfMalformedMessagesLeavesHonestStreamsWhole(t *testing.T) {
	h := newHarness(t, nil)
	const honest, perDevice = 20, 40
	flooders, perFlooder := 40, 250 // 10,000 messages
	if testing.Short() {
		perFlooder = 50
	}
	base := time.Now().Add(-time.Minute).UnixMilli()
	var sent atomic.Int64
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()

	acked := make([]uint64, honest)
	var wg sync.WaitGroup
	for i := 0; i < honest; i++ {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			d, _ := h.connect(t, summaryIntro(fmt.Sprintf("honest-%02d", i)))
			for s := uint64(1); s <= perDevice; s++ {
				d.send(summary(s, base+int64(s)*1000, 96))
			}
			d.waitAck(perDevice)
			d.mu.Lock()
			acked[i] = d.acked
			d.mu.Unlock()
		}(i)
	}

	garbage := func(k int) []byte {
		b := make([]byte, 1+k%97)
		for j := range b {
			b[j] = byte(k*31 + j*17)
		}
		return b
	}
	enc := func(m *pb.ConnectRequest) []byte { b, _ := proto.Marshal(m); return b }
	// Each flooder plays one part (f % 5):
	//   0 garbage bytes: the stream ends at the first (not protobuf); reopen;
	//   1 a wrong credential: refused at once; reopen;
	//   2 data before an introduction: rejected, the stream ends after 100; reopen;
	//   3 introduced, then chunks with NaN rates and mismatched channels: each rejected;
	//   4 introduced, then too many samples, zero-sequence and empty messages: each rejected.
	var fw sync.WaitGroup
	for f := 0; f < flooders; f++ {
		fw.Add(1)
		go func(f int) {
			defer fw.Done()
			part := f % 5
			var st grpc.ClientStream
			var ended chan struct{}
			open := func() {
				sctx := ctx
				if part == 1 {
					sctx = metadata.AppendToOutgoingContext(ctx, "authorization", "Bearer pf1_bad_"+fmt.Sprint(f))
				}
				var err error
				st, err = h.conn.NewStream(sctx, &pb.IngestService_ServiceDesc.Streams[0], pb.IngestService_Connect_FullMethodName, grpc.ForceCodec(rawCodec{}))
				if err != nil {
					t.Errorf("flooder %d: %v", f, err)
					return
				}
				ended = make(chan struct{})
				go func(st grpc.ClientStream, ended chan struct{}) { // drain answers until the stream ends
					defer close(ended)
					var b []byte
					for st.RecvMsg(&b) == nil {
					}
				}(st, ended)
				if part == 3 || part == 4 {
					b := enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: rawIntro(fmt.Sprintf("flood-%02d", f), 12)}})
					_ = st.SendMsg(&b)
				}
			}
			reopen := func() {
				_ = st.CloseSend()
				select {
				case <-ended:
				case <-time.After(20 * time.Second):
					t.Errorf("flooder %d: the gateway did not end a stream", f)
				}
				open()
			}
			open()
			for k := 0; k < perFlooder; k++ {
				var b []byte
				switch part {
				case 0, 1:
					b = garbage(f*perFlooder + k)
				case 2:
					b = enc(summary(uint64(k+1), base, 97))
				case 3:
					c := &pb.RawChunk{Sequence: uint64(k + 1), DeviceTimeUnixMs: base, SampleRateHz: math.NaN(), Red: []uint32{1}, Ir: []uint32{1, 2}}
					b = enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
				case 4:
					switch k % 3 {
					case 0:
						// Too many samples, within the transport's size limit
						// (a larger message ends the stream: TestOversizedMessagesKeepMemoryBounded).
						c := &pb.RawChunk{Sequence: uint64(k + 1), DeviceTimeUnixMs: base, SampleRateHz: 100, Red: make([]uint32, 4000), Ir: make([]uint32, 4000)}
						b = enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
					case 1:
						b = enc(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: &pb.RawChunk{Sequence: 0, Red: make([]uint32, 200)}}})
					case 2:
						b = enc(&pb.ConnectRequest{})
					}
				}
				sent.Add(1)
				_ = st.SendMsg(&b)
				if part == 0 || part == 1 || (part == 2 && (k+1)%maxRejectsBeforeIntro == 0) {
					reopen()
				}
			}
			_ = st.CloseSend()
			<-ended
		}(f)
	}
	fw.Wait()
	wg.Wait()
	cancel()

	if n := sent.Load(); n != int64(flooders*perFlooder) {
		t.Errorf("sent %d malformed messages, want %d", n, flooders*perFlooder)
	}
	if !h.g.Ready() {
		t.Fatal("gateway not ready after the flood")
	}
	if hc, err := healthpb.NewHealthClient(h.conn).Check(context.Background(), &healthpb.HealthCheckRequest{}); err != nil || hc.GetStatus() != healthpb.HealthCheckResponse_SERVING {
		t.Fatalf("health after the flood: %v %v", hc, err)
	}
	tot, err := h.db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	curs, err := h.db.Cursors()
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < honest; i++ {
		id := fmt.Sprintf("honest-%02d", i)
		lt, c := tot[id], curs[id]
		if lt.Chunks != acked[i] || lt.MaxSeq != acked[i] || !lt.Distinct || c.LastSeq != acked[i] {
			t.Errorf("%s: ledger %+v, cursor last %d; want every one of the %d acknowledged messages once", id, lt, c.LastSeq, acked[i])
		}
		n := 0
		h.db.Trend(id, 0, math.MaxInt64, func(p store.Point) bool { n++; return true })
		if uint64(n) != acked[i] {
			t.Errorf("%s: %d trend points, want %d", id, n, acked[i])
		}
	}
	// The malformed messages did reach the gateway's checks.
	var rejected float64
	for _, line := range strings.Split(h.metrics(t), "\n") {
		if strings.HasPrefix(line, "pulsefleet_messages_rejected_total{") {
			var v float64
			fmt.Sscan(line[strings.LastIndexByte(line, ' ')+1:], &v)
			rejected += v
		}
	}
	// Parts 2, 3 and 4 are rejected one by one (with a reason); part 1 is
	// refused before its first message; part 0's garbage ends its stream
	// unless it happens to decode as a (meaningless) message, then rejected.
	if lo, hi := float64(3*(flooders/5)*perFlooder), float64(4*(flooders/5)*perFlooder); rejected < lo || rejected > hi {
		t.Errorf("%.0f malformed messages rejected with a reason, want %.0f..%.0f", rejected, lo, hi)
	}
	// The gateway still takes new devices.
	d, _ := h.connect(t, summaryIntro("after-flood"))
	d.send(summary(1, base, 97))
	d.waitAck(1)
	h.stop()
	// The refused credentials were audited within the per-host limit (all
	// flooders share 127.0.0.1; the test may straddle minute boundaries, and
	// take minutes under the race detector on a loaded machine).
	db, err := store.Open(h.dir, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	es, _ := db.Audit(0, "auth.", 0)
	if n := 10 * (1 + int(time.Since(time.UnixMilli(base)).Minutes())); len(es) == 0 || len(es) > n {
		t.Errorf("%d auth audit entries after the flood, want 1..%d (10 per host per minute)", len(es), n)
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
