package notify

import (
	"encoding/json"
	"net/http"
	"net/url"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// In a fleet, an alert's identifying labels hold nothing of one gateway:
// the same episode built at two gateways (different store indexes of the
// device, the same engine number) is the same alert; the gateway and its
// stored id are annotations. Outside a fleet the labels stay as they were.
func TestBuildFleetSameAlertOnEveryGateway(t *testing.T) {
	a := &store.Episode{ID: 1<<32 | 3, Device: "d", Condition: "spo2_low", Priority: "high", OnsetMS: 1000, AnnouncedMS: 16000, Active: true}
	b := *a
	b.ID = 7<<32 | 3
	la := BuildFleet(a, nil, "gw-a", "", time.UnixMilli(20000))[0]
	lb := BuildFleet(&b, nil, "gw-b", "", time.UnixMilli(20000))[0]
	if len(la.Labels) != len(lb.Labels) || la.Labels["episode"] != "3" || la.Labels["gateway"] != "" {
		t.Fatalf("fleet labels %v and %v, want equal, episode 3, no gateway", la.Labels, lb.Labels)
	}
	for k, v := range la.Labels {
		if lb.Labels[k] != v {
			t.Errorf("label %s: %q at gw-a, %q at gw-b", k, v, lb.Labels[k])
		}
	}
	if la.Annotations["gateway"] != "gw-a" || lb.Annotations["episode_id"] != "30064771075" {
		t.Errorf("annotations %v, %v", la.Annotations, lb.Annotations)
	}
	if l := Build(a, nil, "gw-a", "", time.UnixMilli(20000))[0].Labels; l["gateway"] != "gw-a" || l["episode"] != "4294967299" {
		t.Errorf("labels without a fleet changed: %v", l)
	}
}

// activeOf returns the alerts of a device that Alertmanager holds firing.
func activeOf(t *testing.T, base, device string) []map[string]any {
	t.Helper()
	resp, err := http.Get(base + "/api/v2/alerts?active=true&filter=" + url.QueryEscape(`device="`+device+`"`))
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

// A device moves from gateway A to gateway B of a fleet during an
// announced episode; B adopts the episode (stores it active, as
// internal/ingest does) and A marks the device moved. The real
// Alertmanager both send to then holds exactly one firing alert for it
// (B's sends refresh A's), and once it ends at B none: A, though alive and
// resending every half second, does not bring it back.
func TestFleetMoveKeepsOneAlertAndItsEndResolvesIt(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/am")))
	opt := Options{URLs: []string{am.URL}, Fleet: true, Resend: 500 * time.Millisecond, Hold: MinHold, BackoffMax: time.Second}
	optA, optB := opt, opt
	optA.Gateway, optB.Gateway = "gw-a", "gw-b"
	ra, rb := newRig(t, optA), newRig(t, optB)
	const dev = "bed-7"
	now := time.Now()
	epA := &store.Episode{ID: 1<<32 | 3, Device: dev, Condition: "spo2_low", Priority: "high",
		OnsetMS: now.Add(-30 * time.Second).UnixMilli(), AnnouncedMS: now.Add(-15 * time.Second).UnixMilli(), MinSpO2: 84, Active: true}
	// Another device stays at A, so A keeps resending (its counter shows
	// A's resends went on after the end at B).
	stays := &store.Episode{ID: 2<<32 | 1, Device: "bed-8", Condition: "signal_lost", Priority: "low",
		OnsetMS: epA.OnsetMS, AnnouncedMS: epA.AnnouncedMS, MinSpO2: -1, Active: true}
	if err := ra.db.Write(&store.Batch{Devices: []*store.Device{{ID: dev, BatteryPct: -1}, {ID: "bed-8", BatteryPct: -1}},
		Episodes: []*store.Episode{epA, stays}}); err != nil {
		t.Fatal(err)
	}
	ra.waitEmpty(t, 20*time.Second)
	waitActive := func(want int, within time.Duration, why string) []map[string]any {
		t.Helper()
		deadline := time.Now().Add(within)
		for {
			as := activeOf(t, am.URL, dev)
			if len(as) == want {
				return as
			}
			if time.Now().After(deadline) {
				t.Fatalf("%s: %d firing alerts for %s after %v, want %d: %v", why, len(as), dev, within, want, as)
			}
			time.Sleep(100 * time.Millisecond)
		}
	}
	waitActive(1, 20*time.Second, "announced at A")

	// The move: A stores the device moved; B stores the adopted episode
	// (its own index for the device, the same engine number).
	if err := ra.db.Write(&store.Batch{Devices: []*store.Device{{ID: dev, BatteryPct: -1, MovedTo: "gw-b", MovedMS: time.Now().UnixMilli()}}}); err != nil {
		t.Fatal(err)
	}
	if err := rb.db.Write(&store.Batch{Devices: []*store.Device{{ID: dev, BatteryPct: -1}, {ID: "other", BatteryPct: -1}}}); err != nil {
		t.Fatal(err)
	}
	epB := *epA
	epB.ID = 2<<32 | 3
	rb.write(t, &epB)
	rb.waitEmpty(t, 20*time.Second)
	deadline := time.Now().Add(20 * time.Second)
	for {
		as := waitActive(1, 20*time.Second, "after the move")
		if an, _ := as[0]["annotations"].(map[string]any); an["gateway"] == "gw-b" {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("the alert is not B's after the move: %v", as)
		}
		time.Sleep(100 * time.Millisecond)
	}

	// The end at B: resolved once B's hold is over, and it stays resolved
	// over several of A's resend intervals.
	epB.Active, epB.EndedMS = false, time.Now().UnixMilli()
	rb.write(t, &epB)
	waitActive(0, MinHold+30*time.Second, "ended at B")
	rb.waitEmpty(t, 20*time.Second)
	before := gather(t, ra.reg, "pulsefleet_notify_resent_total")
	deadline = time.Now().Add(30 * time.Second)
	for gather(t, ra.reg, "pulsefleet_notify_resent_total") < before+3 {
		if time.Now().After(deadline) {
			t.Fatalf("A resent %v alerts in 30 s, want 3 or more", gather(t, ra.reg, "pulsefleet_notify_resent_total")-before)
		}
		time.Sleep(100 * time.Millisecond)
	}
	if as := activeOf(t, am.URL, dev); len(as) != 0 {
		t.Fatalf("firing again after its end at B (A resends the episode of a device that moved away): %v", as)
	}
}
