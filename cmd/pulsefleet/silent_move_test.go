package main

import (
	"context"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/cluster"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// silentOfflineDelay is adult-ward-pilot's device_offline delay. The bound
// README states for a device that streams nowhere after its gateway died:
// device_offline active at its new owner at the later of that delay after
// the device's last stream ended, and 3×TTL + one watchdog tick after the
// gateway's death (the lease expires, the new owner waits 2×TTL for live
// devices to reconnect, then adopts); the test allows 10 s more for load.
const silentOfflineDelay = 60 * time.Second

// A device that stops streaming (not its gateway), whose gateway is then
// killed with SIGKILL, and that never reconnects, is announced offline by
// the survivor that now owns it: that survivor adopts the device's shared
// alarm state (the offline report the dead gateway published) and its
// offline rule runs, so FleetService lists the device with device_offline
// active there, announced once, and not on the other survivor. Without the
// adoption no survivor knows the device and the alarm is shown by nobody.
func TestFleetOnEtcdSilentDeviceOfflineAfterKill9(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 3)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	f.waitMembers(3, 20*time.Second)
	const id = "silent-0001"
	dctx, stopDevice := context.WithCancel(ctx)
	d, addr := openOwned(t, dctx, f.addrs[0], id, 10*time.Second)
	first := slices.Index(f.addrs, addr)
	t0 := time.Now().Add(-10 * time.Second).Truncate(time.Second).UnixMilli()
	for i := int64(0); i < 8; i++ {
		d.send(uint64(i+1), t0+i*1000, 96)
	}
	for d.acked < 8 {
		d.recv()
	}
	// The device stops (battery flat): its gateway puts it offline and
	// publishes that to the fleet; then the gateway dies.
	stopDevice()
	stopped := time.Now()
	time.Sleep(time.Second)
	f.kill(first)
	killed := time.Now()
	var survivors []string
	for i, a := range f.addrs {
		if i != first {
			survivors = append(survivors, a)
		}
	}
	ring, err := shard.NewRing(survivors)
	if err != nil {
		t.Fatal(err)
	}
	owner := slices.Index(f.addrs, ring.Owner(id))
	other := 3 - first - owner
	bound := stopped.Add(silentOfflineDelay)
	if b := killed.Add(3*cluster.DefaultTTL + time.Second); b.After(bound) {
		bound = b
	}
	deadline := bound.Add(10 * time.Second) // margin for a loaded machine
	var last []string
	for {
		gd, err := fleetClient(t, f.addrs[owner]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
		if err == nil {
			last = gd.GetDevice().GetActiveConditions()
			if gd.GetDevice().GetConnected() {
				t.Fatalf("new owner lists the stopped device as connected")
			}
			if slices.Contains(last, "device_offline") {
				break
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("new owner (gateway %d): device %s active conditions %v (err %v) %v after the device stopped, want device_offline by %v",
				owner, id, last, err, time.Since(stopped).Round(100*time.Millisecond), deadline.Sub(stopped).Round(time.Second))
		}
		time.Sleep(250 * time.Millisecond)
	}
	t.Logf("device_offline active at the new owner %v after the device stopped, %v after the kill (delay %v)",
		time.Since(stopped).Round(100*time.Millisecond), time.Since(killed).Round(100*time.Millisecond), silentOfflineDelay)
	if l := announcedOn(f, owner, "device_offline"); !strings.HasSuffix(l, " 1") {
		t.Errorf("new owner: %q, want device_offline announced once", l)
	}
	if l := announcedOn(f, other, "device_offline"); l != "" && !strings.HasSuffix(l, " 0") {
		t.Errorf("other survivor: %q, want no device_offline announcement (it does not own the device)", l)
	}
	code, out, stderr := runCmd("devices", "--gateway", f.addrs[owner])
	if code != 0 || !strings.Contains(out, id) || !strings.Contains(out, alarms.Label("device_offline")) {
		t.Errorf("pulsefleet devices at the new owner: exit %d, stderr %q, out:\n%s\nwant %s with %q", code, stderr, out, id, alarms.Label("device_offline"))
	}
}
