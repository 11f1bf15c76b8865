package main

import (
	"context"
	"io"
	"net/http"
	"strconv"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// applyBound is the stated time within which a control-plane change taken
// by one gateway is in force on the others.
const applyBound = 2 * time.Second

func adminClient(t *testing.T, addr string) pb.AdminServiceClient {
	t.Helper()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return pb.NewAdminServiceClient(conn)
}

func fleetClient(t *testing.T, addr string) pb.FleetServiceClient {
	t.Helper()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return pb.NewFleetServiceClient(conn)
}

func bearer(token string) context.Context {
	return metadata.AppendToOutgoingContext(context.Background(), "authorization", "Bearer "+token)
}

func readyz(addr string) (int, string) {
	resp, err := http.Get("http://" + addr + "/readyz")
	if err != nil {
		return 0, err.Error()
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// A credential issued through one gateway works on the other within
// applyBound, and a default alarm profile set through one is in force for a
// device streaming to the other within applyBound; etcd stopped for 30 s: streams and their acknowledgements go
// on, credential and profile changes are refused with a clear error, /readyz and the
// metric say degraded; etcd back: a revocation through the other gateway
// is in force on the first within applyBound, and the audit entries name
// the gateway that took each change.
func TestFleetOnEtcdSharedSettingsAndOutage(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 2)
	a0, a1 := adminClient(t, f.addrs[0]), adminClient(t, f.addrs[1])
	// The first credential: both gateways are open (loopback, none issued).
	iss, err := a0.IssueToken(context.Background(), &pb.IssueTokenRequest{Operator: "ops", Role: pb.Role_ROLE_ADMIN})
	if err != nil {
		t.Fatal(err)
	}
	issued := time.Now()
	admin := iss.GetSecret()
	var took time.Duration
	for {
		if _, err := a1.ListTokens(bearer(admin), &pb.ListTokensRequest{}); err == nil {
			took = time.Since(issued)
			break
		}
		if time.Since(issued) > applyBound {
			t.Fatalf("a credential issued through gateway 0 does not work on gateway 1 within %v", applyBound)
		}
		time.Sleep(10 * time.Millisecond)
	}
	t.Logf("credential issued through gateway 0 accepted by gateway 1 after %v", took.Round(time.Millisecond))
	// Gateway 1 is closed now too: a call without the credential is refused.
	if _, err := a1.ListTokens(context.Background(), &pb.ListTokensRequest{}); status.Code(err) != codes.Unauthenticated {
		t.Fatalf("gateway 1 without a credential: %v, want UNAUTHENTICATED (it holds the fleet's credential)", err)
	}
	dev, err := a0.IssueToken(bearer(admin), &pb.IssueTokenRequest{DeviceId: "cp-0001"})
	if err != nil {
		t.Fatal(err)
	}

	// A device streams through the outage.
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	repc := make(chan *sim.Report, 1)
	go func() {
		r, err := sim.Run(ctx, sim.Options{Gateway: f.addrs[0], Fallbacks: f.addrs[1:], Devices: 1, IDPrefix: "cp", Mode: sim.ModeSummary,
			Token: dev.GetSecret(), Seed: 5, Drain: -1})
		if err != nil {
			t.Errorf("sim: %v", err)
		}
		repc <- r
	}()
	f.waitAllConnected(t, 1, 30*time.Second)
	holder := 0
	if len(f.connected(1)) == 1 {
		holder = 1
	}
	// A default profile set through the gateway the device does NOT stream
	// to is in force for the device within applyBound.
	other := 1 - holder
	fl := fleetClient(t, f.addrs[holder])
	if _, err := fleetClient(t, f.addrs[other]).SetAlarmProfile(bearer(admin), &pb.SetAlarmProfileRequest{ProfileYaml: "home-overnight", Reason: "fleet test"}); err != nil {
		t.Fatalf("set the default profile through gateway %d: %v", other, err)
	}
	set := time.Now()
	for {
		r, err := fl.GetAlarmProfile(bearer(admin), &pb.GetAlarmProfileRequest{DeviceId: "cp-0001"})
		if err == nil && r.GetName() == "home-overnight" {
			t.Logf("default profile set through gateway %d in force for a device on gateway %d after %v", other, holder, time.Since(set).Round(time.Millisecond))
			break
		}
		if time.Since(set) > applyBound {
			t.Fatalf("profile for the device on gateway %d after %v: %v %v, want home-overnight", holder, applyBound, r.GetName(), err)
		}
		time.Sleep(10 * time.Millisecond)
	}
	before := acceptedOn(f, holder)

	f.etcd.Stop()
	outage := time.Now()
	for _, i := range []int{0, 1} {
		for {
			code, body := readyz(f.kids[i].httpAddr)
			if code == http.StatusOK && strings.Contains(body, "degraded") && strings.Contains(scrapeMetrics(f.kids[i].httpAddr), "pulsefleet_controlplane_up 0") {
				break
			}
			if time.Since(outage) > 10*time.Second {
				t.Fatalf("gateway %d: /readyz %d %q, want 200 and degraded within 10 s of etcd stopping", i, code, body)
			}
			time.Sleep(100 * time.Millisecond)
		}
	}
	_, err = a1.IssueToken(bearer(admin), &pb.IssueTokenRequest{Operator: "late", Role: pb.Role_ROLE_VIEWER})
	if status.Code(err) != codes.Unavailable || !strings.Contains(err.Error(), "control plane (etcd) is unreachable") {
		t.Fatalf("credential change while etcd is down: %v, want UNAVAILABLE naming the unreachable control plane", err)
	}
	if _, err := a0.ListTokens(bearer(admin), &pb.ListTokensRequest{}); err != nil {
		t.Fatalf("the last known credential stops working while etcd is down: %v", err)
	}
	_, err = fleetClient(t, f.addrs[0]).SetAlarmProfile(bearer(admin), &pb.SetAlarmProfileRequest{ProfileYaml: "adult-ward-pilot", Reason: "during the outage"})
	if status.Code(err) != codes.Unavailable {
		t.Fatalf("profile change while etcd is down: %v, want UNAVAILABLE", err)
	}
	time.Sleep(30*time.Second - time.Since(outage))
	during := acceptedOn(f, holder)
	if during <= before {
		t.Errorf("messages accepted by the device's gateway: %d before the outage, %d after 30 s of it, want more (ingest goes on)", before, during)
	}
	f.etcd.Start()
	back := time.Now()
	for _, i := range []int{0, 1} {
		for {
			if code, body := readyz(f.kids[i].httpAddr); code == http.StatusOK && strings.TrimSpace(body) == "ready" {
				break
			}
			if time.Since(back) > 15*time.Second {
				t.Fatalf("gateway %d: /readyz not back to ready within 15 s of etcd returning", i)
			}
			time.Sleep(100 * time.Millisecond)
		}
	}
	// A change through gateway 1 applies on gateway 0: revoke the device's
	// credential; its stream (wherever it is) ends and it is refused.
	if _, err := a1.RevokeToken(bearer(admin), &pb.RevokeTokenRequest{TokenId: dev.GetToken().GetTokenId()}); err != nil {
		t.Fatalf("revoke through gateway 1 after etcd is back: %v", err)
	}
	revoked := time.Now()
	for {
		ts, err := a0.ListTokens(bearer(admin), &pb.ListTokensRequest{})
		if err != nil {
			t.Fatal(err)
		}
		done := false
		for _, tk := range ts.GetTokens() {
			done = done || tk.GetTokenId() == dev.GetToken().GetTokenId() && tk.GetRevokedUnixMs() != 0
		}
		if done {
			break
		}
		if time.Since(revoked) > applyBound {
			t.Fatalf("a revocation through gateway 1 is not in force on gateway 0 within %v", applyBound)
		}
		time.Sleep(10 * time.Millisecond)
	}
	cancel()
	<-repc
	au, err := a0.ListAudit(bearer(admin), &pb.ListAuditRequest{})
	if err != nil {
		t.Fatal(err)
	}
	var named []string
	for _, e := range au.GetEntries() {
		if strings.HasPrefix(e.GetAction(), "token.") && strings.Contains(e.GetDetail(), "gateway "+f.addrs[1]) {
			named = append(named, e.GetAction()+": "+e.GetDetail())
		}
	}
	if len(named) == 0 {
		t.Errorf("gateway 0's audit log has no credential change naming gateway %s, which took the revocation", f.addrs[1])
	}
}

// acceptedOn is gateway i's count of accepted summaries.
func acceptedOn(f *etcdFleet, i int) int {
	l := findLine(scrapeMetrics(f.kids[i].httpAddr), `pulsefleet_messages_received_total{mode="summary"} `)
	n, err := strconv.ParseFloat(strings.TrimPrefix(l, `pulsefleet_messages_received_total{mode="summary"} `), 64)
	if err != nil {
		return -1
	}
	return int(n)
}
