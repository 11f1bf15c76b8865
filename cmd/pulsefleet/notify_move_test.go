package main

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/cluster"
	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/shard"
)

// amFiring returns the alerts of a device that Alertmanager holds firing
// (of one condition when device is "ID/CONDITION").
func amFiring(t *testing.T, base, device string) []map[string]any {
	t.Helper()
	q := "&filter=" + url.QueryEscape(`device="`+device+`"`)
	if dev, cond, ok := strings.Cut(device, "/"); ok {
		q = "&filter=" + url.QueryEscape(`device="`+dev+`"`) + "&filter=" + url.QueryEscape(`condition="`+cond+`"`)
	}
	resp, err := http.Get(base + "/api/v2/alerts?active=true" + q)
	if err != nil {
		t.Fatalf("GET /api/v2/alerts: %v", err)
	}
	defer resp.Body.Close()
	var alerts []map[string]any
	if err := json.NewDecoder(resp.Body).Decode(&alerts); err != nil {
		t.Fatalf("GET /api/v2/alerts: %v", err)
	}
	return alerts
}

// waitFiring waits until Alertmanager holds want firing alerts of device,
// each (when gateway is given) last sent by that gateway.
func waitFiring(t *testing.T, base, device string, want int, gateway string, within time.Duration) {
	t.Helper()
	deadline := time.Now().Add(within)
	for {
		as := amFiring(t, base, device)
		ok := len(as) == want
		for _, a := range as {
			an, _ := a["annotations"].(map[string]any)
			ok = ok && (gateway == "" || an["gateway"] == gateway)
		}
		if ok {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("Alertmanager holds %d firing alerts of %s after %v, want %d (from %q): %v", len(as), device, within, want, gateway, as)
		}
		time.Sleep(200 * time.Millisecond)
	}
}

func resentOn(f *etcdFleet, i int) float64 {
	l := findLine(scrapeMetrics(f.kids[i].httpAddr), "pulsefleet_notify_resent_total{")
	v, _ := strconv.ParseFloat(l[strings.LastIndexByte(l, ' ')+1:], 64)
	return v
}

// A device with an announced alarm moves from a live gateway to one that
// joins the fleet: the real Alertmanager both notify holds exactly one
// firing alert for the episode (the new gateway's sends refresh the old
// one's), and none once it ended at the new gateway, also after the
// gateway it left resent its other active alerts (it does not bring the
// moved one back).
func TestFleetOnEtcdNotificationFollowsTheMove(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/hook")))
	// A condition that does not latch, so it ends when SpO2 is back up.
	prof := filepath.Join(t.TempDir(), "fast.yaml")
	if err := os.WriteFile(prof, []byte("name: fast\nconditions:\n  - kind: spo2_low\n    limit: 90\n    hysteresis: 2\n    delay: 3s\n    priority: high\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	f := newEtcdFleet(t, 3, "--profile", prof, "--alertmanager", am.URL, "--alertmanager-hold", "5s")
	defer f.stopAll()
	const joiner = 2
	f.kill(joiner)
	f.waitMembers2(t, []int{0, 1}, 2, 30*time.Second)
	from := 0
	id := movingDevice(t, f.addrs, from, joiner)
	stays := stayingDevice(t, f.addrs, from, joiner)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	t0 := time.Now().Add(-90 * time.Second).Truncate(time.Second).UnixMilli()
	for _, dev := range []string{stays, id} {
		c, owner := openOwned(t, ctx, f.addrs[from], dev, 10*time.Second)
		if owner != f.addrs[from] {
			t.Fatalf("device %s taken by %s, want %s", dev, owner, f.addrs[from])
		}
		for i := int64(0); i < 40; i++ { // spo2_low announced after its 3 s delay
			c.send(uint64(i+1), t0+i*1000, 80)
		}
		for c.acked < 40 {
			c.recv()
		}
	}
	waitFiring(t, am.URL, id, 1, f.addrs[from], 30*time.Second)
	waitFiring(t, am.URL, stays, 1, f.addrs[from], 30*time.Second)
	time.Sleep(500 * time.Millisecond) // the alarm snapshot's publication

	f.start(t, joiner)
	d2, at := openOwned(t, ctx, f.addrs[from], id, 30*time.Second)
	if at != f.addrs[joiner] {
		t.Fatalf("device reconnected to %s, want %s", at, f.addrs[joiner])
	}
	d2.send(41, t0+40_000, 80)
	for d2.acked < 41 {
		d2.recv()
	}
	// One alert, now sent by the new gateway.
	waitFiring(t, am.URL, id, 1, f.addrs[joiner], 30*time.Second)

	// The end at the new gateway: resolved after its hold, and still
	// resolved after the old gateway's next resends (every minute).
	for i := int64(41); i < 61; i++ {
		d2.send(uint64(i+1), t0+i*1000, 97)
	}
	for d2.acked < 61 {
		d2.recv()
	}
	waitFiring(t, am.URL, id, 0, "", 40*time.Second)
	before := resentOn(f, from)
	deadline := time.Now().Add(150 * time.Second)
	for resentOn(f, from) <= before {
		if time.Now().After(deadline) {
			t.Fatalf("the old gateway resent nothing in 150 s (resent_total %v)", before)
		}
		time.Sleep(500 * time.Millisecond)
	}
	if as := amFiring(t, am.URL, id); len(as) != 0 {
		t.Fatalf("firing again after its end at the new gateway: %v", as)
	}
}

// stayingDevice picks a device id that gateway from owns before and after
// gateway joiner joins.
func stayingDevice(t *testing.T, addrs []string, from, joiner int) string {
	t.Helper()
	var others []string
	for i, a := range addrs {
		if i != joiner {
			others = append(others, a)
		}
	}
	without, _ := shard.NewRing(others)
	with, _ := shard.NewRing(addrs)
	for i := 0; i < 10000; i++ {
		id := fmt.Sprintf("stays-%04d", i)
		if without.Owner(id) == addrs[from] && with.Owner(id) == addrs[from] {
			return id
		}
	}
	t.Fatal("no device id stays as wanted")
	return ""
}

// A device with an announced alarm stops streaming and then its gateway is
// killed: the survivor that adopts the device without a stream, though its
// store never had the device, stores the adopted episode and sends it
// firing to the real Alertmanager (the dead gateway no longer resends it,
// and Alertmanager would otherwise resolve it on its own while the alarm
// goes on).
func TestFleetOnEtcdNotificationFollowsASilentAdoption(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/hook")))
	prof := filepath.Join(t.TempDir(), "fast.yaml")
	if err := os.WriteFile(prof, []byte("name: fast\nconditions:\n  - kind: spo2_low\n    limit: 90\n    hysteresis: 2\n    delay: 3s\n    priority: high\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	f := newEtcdFleet(t, 2, "--profile", prof, "--alertmanager", am.URL, "--alertmanager-hold", "5s")
	defer f.stopAll()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	const id = "silent-am-0001"
	dctx, stopDevice := context.WithCancel(ctx)
	d, addr := openOwned(t, dctx, f.addrs[0], id, 10*time.Second)
	first := slices.Index(f.addrs, addr)
	survivor := 1 - first
	t0 := time.Now().Add(-20 * time.Second).Truncate(time.Second).UnixMilli()
	for i := int64(0); i < 10; i++ {
		d.send(uint64(i+1), t0+i*1000, 80)
	}
	for d.acked < 10 {
		d.recv()
	}
	spo2 := id + "/spo2_low"
	waitFiring(t, am.URL, spo2, 1, f.addrs[first], 30*time.Second)
	stopDevice()
	time.Sleep(time.Second) // the offline report's publication
	f.kill(first)
	// The survivor's store has no model for the device (it was never
	// introduced there), so its alert lacks that label and is another
	// alert beside the dead gateway's, which Alertmanager resolves after its
	// resolve_timeout (README, notifications across a move).
	deadline := time.Now().Add(3*cluster.DefaultTTL + 60*time.Second)
	for {
		as := amFiring(t, am.URL, spo2)
		n := 0
		for _, a := range as {
			if an, _ := a["annotations"].(map[string]any); an["gateway"] == f.addrs[survivor] {
				n++
			}
		}
		if n == 1 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("no firing spo2_low alert from the survivor %s: %v", f.addrs[survivor], as)
		}
		time.Sleep(200 * time.Millisecond)
	}
}
