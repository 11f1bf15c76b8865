package main

import (
	"context"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/cluster"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// auditHas reports whether gateway addr's audit log holds an entry of
// action for device whose detail contains want.
func auditHas(t *testing.T, addr, action, device, want string) bool {
	t.Helper()
	r, err := adminClient(t, addr).ListAudit(context.Background(), &pb.ListAuditRequest{ActionPrefix: action})
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range r.GetEntries() {
		if e.GetDeviceId() == device && strings.Contains(e.GetDetail(), want) {
			return true
		}
	}
	return false
}

// `pulsefleet retire` refuses a streaming device; for a device adopted by a
// survivor after its gateway's kill -9 (its alarm state shared in etcd, an
// announced spo2_low going on there) it deletes the shared state and ends
// the episode on the survivor (audited with the gateway that took it); the
// killed gateway, back before the retirement and not asked, ends what its
// own store still held of the device (fleet sync) rather than showing it.
func TestFleetOnEtcdRetireDevice(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 2)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	const id = "retire-0001"
	dctx, stopDevice := context.WithCancel(ctx)
	d, owner := openOwned(t, dctx, f.addrs[0], id, 10*time.Second)
	first := slices.Index(f.addrs, owner)
	other := 1 - first
	t0 := time.Now().Add(-60 * time.Second).Truncate(time.Second).UnixMilli()
	for i := int64(0); i < 40; i++ { // spo2_low announced after its 15 s delay
		d.send(uint64(i+1), t0+i*1000, 80)
	}
	for d.acked < 40 {
		d.recv()
	}
	all := strings.Join(f.addrs, ",")
	code, out, stderr := runCmd("retire", "--gateway", all, "--device", id)
	if code != 1 || !strings.Contains(stderr, "is streaming to") || !strings.Contains(stderr, f.addrs[first]) {
		t.Fatalf("retire of a streaming device: code %d, want 1 and the gateway it streams to named:\n%s%s", code, out, stderr)
	}
	etcd := f.etcd.Client(t)
	alarmKey := cluster.DefaultPrefix + "alarm/" + id
	stopDevice() // battery flat: offline, published to the fleet
	waitUntil(t, 10*time.Second, "the device's alarm state in etcd", func() bool {
		r, err := etcd.Get(ctx, alarmKey)
		return err == nil && len(r.Kvs) == 1 && strings.Contains(string(r.Kvs[0].Value), `"offline":true`)
	})
	f.kill(first)
	waitUntil(t, 30*time.Second, "the survivor adopts the silent device with spo2_low active", func() bool {
		gd, err := fleetClient(t, f.addrs[other]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
		return err == nil && slices.Contains(gd.GetDevice().GetActiveConditions(), "spo2_low")
	})

	// The killed gateway returns before the retirement: its own store still
	// holds the device's spo2_low, so both gateways show it.
	f.start(t, first)
	f.waitMembers(2, 30*time.Second)
	waitUntil(t, 30*time.Second, "the returned gateway shows the device's spo2_low from its store", func() bool {
		gd, err := fleetClient(t, f.addrs[first]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
		return err == nil && slices.Contains(gd.GetDevice().GetActiveConditions(), "spo2_low")
	})

	time.Sleep(2*cluster.DefaultTTL + 3*time.Second) // past its scan after joining: only its periodic look remains
	// Retired through the survivor only.
	code, out, stderr = runCmd("retire", "--gateway", f.addrs[other], "--device", id, "--reason", "returned to stores")
	if code != 0 || !strings.Contains(out, "retired") || !strings.Contains(out, "1 open episodes ended") {
		t.Fatalf("retire on the survivor: code %d, want 0 and one episode ended:\n%s%s", code, out, stderr)
	}
	if r, err := etcd.Get(ctx, alarmKey); err != nil || len(r.Kvs) != 0 {
		t.Errorf("shared alarm state still in etcd after retire: %v, %v", r, err)
	}
	gd, err := fleetClient(t, f.addrs[other]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil || len(gd.GetDevice().GetActiveConditions()) != 0 {
		t.Errorf("survivor after retire: %v, %v; want the device listed with no active condition", gd.GetDevice(), err)
	}
	waitUntil(t, 10*time.Second, "the ended spo2_low episode stored on the survivor", func() bool {
		r, err := fleetClient(t, f.addrs[other]).ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: id})
		if err != nil {
			return false
		}
		for _, e := range r.GetEpisodes() {
			if e.GetCondition() == "spo2_low" && e.GetEndedUnixMs() > 0 && !e.GetActive() {
				return true
			}
		}
		return false
	})
	waitUntil(t, 10*time.Second, "the retirement audited with the gateway that took it", func() bool {
		return auditHas(t, f.addrs[other], "device.retire", id, "taken by gateway "+f.addrs[other]) &&
			auditHas(t, f.addrs[other], "device.retire", id, "returned to stores")
	})

	// The other gateway, not asked, ends what its store held of the device
	// (fleet sync, within retiredEvery) instead of raising it again.
	waitUntil(t, 30*time.Second+20*time.Second, "the gateway not asked ends the retired device's episodes", func() bool {
		return auditHas(t, f.addrs[first], "device.retire", id, "fleet sync: device retired through gateway "+f.addrs[other])
	})
	gd, err = fleetClient(t, f.addrs[first]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil || len(gd.GetDevice().GetActiveConditions()) != 0 {
		t.Errorf("returned gateway: %v, %v; want the device with no active condition", gd.GetDevice(), err)
	}
	if r, err := etcd.Get(ctx, alarmKey); err != nil || len(r.Kvs) != 0 {
		t.Errorf("shared alarm state back in etcd: %v, %v", r, err)
	}
}

func waitUntil(t *testing.T, within time.Duration, what string, ok func() bool) {
	t.Helper()
	deadline := time.Now().Add(within)
	for !ok() {
		if time.Now().After(deadline) {
			t.Fatalf("not within %v: %s", within, what)
		}
		time.Sleep(100 * time.Millisecond)
	}
}
