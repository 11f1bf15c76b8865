package main

import (
	"context"
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/shard"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// movingDevice picks a device id that gateway set from owns and that the
// gateway to wins once it joins.
func movingDevice(t *testing.T, addrs []string, from, to int) string {
	t.Helper()
	without, _ := shard.NewRing([]string{addrs[from], addrs[3-from-to]})
	with, _ := shard.NewRing(addrs)
	for i := 0; i < 10000; i++ {
		id := fmt.Sprintf("away-%04d", i)
		if without.Owner(id) == addrs[from] && with.Owner(id) == addrs[to] {
			return id
		}
	}
	t.Fatal("no device id moves as wanted")
	return ""
}

// A device with an announced alarm moves away from a live gateway (a member
// joins and wins it): the gateway it left still lists the device and the
// episode, marked as moved to the new gateway, neither active (no active
// condition, not in the active episodes or the active-alarm gauge) nor
// ended; `pulsefleet devices` there says where it went; the gateway it
// moved to shows the episode active (adopted, not announced again).
func TestFleetOnEtcdMovedAwayEpisodesShowWhereTheyWent(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 3)
	const joiner = 2
	f.kill(joiner)
	f.waitMembers2(t, []int{0, 1}, 2, 30*time.Second)
	from := 0
	id := movingDevice(t, f.addrs, from, joiner)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	d, owner := openOwned(t, ctx, f.addrs[from], id, 10*time.Second)
	if owner != f.addrs[from] {
		t.Fatalf("device %s taken by %s, want %s", id, owner, f.addrs[from])
	}
	t0 := time.Now().Add(-90 * time.Second).Truncate(time.Second).UnixMilli()
	for i := int64(0); i < 40; i++ { // spo2_low announced after its 15 s delay
		d.send(uint64(i+1), t0+i*1000, 80)
	}
	for d.acked < 40 {
		d.recv()
	}
	if l := announcedOn(f, from, "spo2_low"); !strings.HasSuffix(l, " 1") {
		t.Fatalf("gateway %d: %q, want spo2_low announced once before the move", from, l)
	}
	time.Sleep(500 * time.Millisecond) // the alarm snapshot's publication
	f.start(t, joiner)
	fc := fleetClient(t, f.addrs[from])
	deadline := time.Now().Add(30 * time.Second)
	var dev *pb.Device
	for {
		gd, err := fc.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
		if err != nil {
			t.Fatal(err)
		}
		if dev = gd.GetDevice(); dev.GetMovedToGateway() != "" {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("gateway %d does not show device %s moved within 30 s of the join: %v", from, id, dev)
		}
		time.Sleep(100 * time.Millisecond)
	}
	if dev.GetMovedToGateway() != f.addrs[joiner] || dev.GetConnected() || len(dev.GetActiveConditions()) != 0 || dev.GetMovedUnixMs() == 0 {
		t.Errorf("left gateway's device: moved to %q at %d, connected %v, active %v; want moved to %s, not connected, no active condition",
			dev.GetMovedToGateway(), dev.GetMovedUnixMs(), dev.GetConnected(), dev.GetActiveConditions(), f.addrs[joiner])
	}
	var ep *pb.Episode
	for ep.GetMovedToGateway() == "" && time.Now().Before(deadline.Add(10*time.Second)) { // stored by the writer
		all, err := fc.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: id})
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range all.GetEpisodes() {
			if e.GetCondition() == "spo2_low" {
				ep = e
			}
		}
		time.Sleep(50 * time.Millisecond)
	}
	if ep == nil || ep.GetMovedToGateway() != f.addrs[joiner] || ep.GetActive() || ep.GetEndedUnixMs() != 0 || ep.GetAnnouncedUnixMs() == 0 {
		t.Errorf("left gateway's spo2_low episode %v: want listed, announced, moved to %s, not active, not ended", ep, f.addrs[joiner])
	}
	act, err := fc.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: id, ActiveOnly: true})
	if err != nil || len(act.GetEpisodes()) != 0 {
		t.Errorf("left gateway's active episodes of %s: %v, %v; want none (active where the device streams)", id, act.GetEpisodes(), err)
	}
	if l := findLine(scrapeMetrics(f.kids[from].httpAddr), `pulsefleet_alarms_active{condition="spo2_low"`); l != "" && !strings.HasSuffix(l, " 0") {
		t.Errorf("left gateway's gauge: %q, want 0", l)
	}
	code, out, stderr := runCmd("devices", "--gateway", f.addrs[from])
	if code != 0 || !strings.Contains(out, id) || !strings.Contains(out, "moved to "+f.addrs[joiner]) {
		t.Errorf("devices --gateway (left gateway): code %d, want %s listed as moved to %s:\n%s%s", code, id, f.addrs[joiner], out, stderr)
	}
	code, out, stderr = runCmd("episodes", "--gateway", f.addrs[from], "--device", id)
	if code != 0 || !strings.Contains(out, "moved to "+f.addrs[joiner]) {
		t.Errorf("episodes --gateway (left gateway): code %d, want the episode moved to %s:\n%s%s", code, f.addrs[joiner], out, stderr)
	}

	// The device follows: at the new gateway the episode is active.
	d2, at := openOwned(t, ctx, f.addrs[from], id, 20*time.Second)
	if at != f.addrs[joiner] {
		t.Fatalf("device reconnected to %s, want %s", at, f.addrs[joiner])
	}
	d2.send(41, t0+40_000, 80)
	for d2.acked < 41 {
		d2.recv()
	}
	gd, err := fleetClient(t, f.addrs[joiner]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Contains(gd.GetDevice().GetActiveConditions(), "spo2_low") || gd.GetDevice().GetMovedToGateway() != "" {
		t.Errorf("new gateway: active %v, moved %q; want spo2_low active there", gd.GetDevice().GetActiveConditions(), gd.GetDevice().GetMovedToGateway())
	}
	if l := announcedOn(f, joiner, "spo2_low"); l != "" && !strings.HasSuffix(l, " 0") {
		t.Errorf("new gateway: %q, want spo2_low not announced again", l)
	}
}

// waitMembers2 waits until the gateways in which all see n members.
func (f *etcdFleet) waitMembers2(t testing.TB, which []int, n int, within time.Duration) {
	t.Helper()
	deadline := time.Now().Add(within)
	for {
		ok := true
		for _, i := range which {
			g := membersRe.FindStringSubmatch(findLine(scrapeMetrics(f.kids[i].httpAddr), "pulsefleet_cluster_members "))
			ok = ok && g != nil && g[1] == fmt.Sprint(n)
		}
		if ok {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("gateways %v do not see %d members within %v", which, n, within)
		}
		time.Sleep(100 * time.Millisecond)
	}
}
