package notify

import (
	"context"
	"encoding/json"
	"net/http"
	"strconv"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// runFor runs n until the returned stop is called (and waits for it).
func runFor(n *Notifier) (stop func()) {
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); _ = n.Run(ctx) }()
	return func() { cancel(); <-done }
}

// rig is a real store with the outbox on, a notifier running on it, and
// its metrics.
type rig struct {
	db  *store.DB
	n   *Notifier
	reg *prometheus.Registry
}

func newRig(t *testing.T, opt Options) *rig {
	t.Helper()
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	reg := prometheus.NewRegistry()
	m, err := NewMetrics(reg)
	if err != nil {
		t.Fatal(err)
	}
	opt.Store, opt.Metrics = db, m
	n, err := New(opt)
	if err != nil {
		t.Fatal(err)
	}
	db.EnableOutbox(n.Kick)
	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		if err := n.Run(ctx); err != nil {
			t.Errorf("Run: %v", err)
		}
	}()
	t.Cleanup(func() {
		cancel()
		wg.Wait()
		db.Close()
	})
	return &rig{db: db, n: n, reg: reg}
}

func (r *rig) write(t *testing.T, eps ...*store.Episode) {
	t.Helper()
	if err := r.db.Write(&store.Batch{Episodes: eps}); err != nil {
		t.Fatal(err)
	}
}

func (r *rig) queued(t *testing.T) int {
	t.Helper()
	_, n, err := r.db.Outbox(0)
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// waitEmpty waits until the outbox is empty.
func (r *rig) waitEmpty(t *testing.T, timeout time.Duration) {
	t.Helper()
	deadline := time.Now().Add(timeout)
	for r.queued(t) > 0 {
		if time.Now().After(deadline) {
			t.Fatalf("outbox still holds %d notifications after %v", r.queued(t), timeout)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// count returns how many delivered alerts match status and episode, by receiver.
func count(all []notifytest.Delivered, status string, episode uint64) map[string]int {
	out := map[string]int{}
	for _, a := range all {
		if a.Status == status && a.Labels["episode"] == strconv.FormatUint(episode, 10) {
			out[a.Receiver]++
		}
	}
	return out
}

// An announced episode reaches the webhook receivers behind both
// Alertmanagers of an HA pair with the device's labels; its end arrives as
// resolved with the episode's end time; the outbox is then empty.
func TestAnnouncedAndEndedReachTheReceiverThroughBothAlertmanagers(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	amA := notifytest.Start(t, notifytest.Config(recv.URL("/am-a")))
	amB := notifytest.Start(t, notifytest.Config(recv.URL("/am-b")))
	// The end follows the firing's delivery at once: its resolution waits
	// for the (shortest) hold, so the firing notification goes out first.
	r := newRig(t, Options{URLs: []string{amA.URL, amB.URL}, Gateway: "gw-test", PageBase: "http://gw.example:7401/", Hold: MinHold})
	dev := &store.Device{ID: "bed 3", Model: "proto-ox2", Labels: map[string]string{"ward": "3 North", "bed.no": "7", "priority": "spoof"}}
	if err := r.db.Write(&store.Batch{Devices: []*store.Device{dev}}); err != nil {
		t.Fatal(err)
	}
	onset := time.Date(2026, 12, 2, 3, 4, 5, 0, time.UTC)
	ep := &store.Episode{ID: 5<<32 | 1, Device: "bed 3", Condition: "spo2_low", Priority: "high",
		OnsetMS: onset.UnixMilli(), AnnouncedMS: onset.Add(15 * time.Second).UnixMilli(), MinSpO2: 84, Limit: 90, Active: true, Profile: "adult-ward-pilot"}
	r.write(t, ep)

	both := func(status string) func([]notifytest.Delivered) bool {
		return func(all []notifytest.Delivered) bool {
			c := count(all, status, ep.ID)
			return c["/am-a"] > 0 && c["/am-b"] > 0
		}
	}
	all, ok := recv.Wait(20*time.Second, both("firing"))
	if !ok {
		t.Fatalf("the announced episode did not arrive through both Alertmanagers; received %+v", all)
	}
	var a notifytest.Delivered
	for _, d := range all {
		if d.Status == "firing" {
			a = d
		}
	}
	want := map[string]string{"alertname": AlertName, "device": "bed 3", "condition": "spo2_low", "priority": "high",
		"model": "proto-ox2", "gateway": "gw-test", "episode": strconv.FormatUint(ep.ID, 10), "ward": "3 North", "bed_no": "7"}
	for k, v := range want {
		if a.Labels[k] != v {
			t.Errorf("label %s = %q, want %q (labels %v)", k, a.Labels[k], v, a.Labels)
		}
	}
	if len(a.Labels) != len(want) {
		t.Errorf("labels %v, want exactly %v (a device label may not override the gateway's own)", a.Labels, want)
	}
	wantAnn := map[string]string{"spo2_min": "84 %", "limit": "90", "onset": "2026-12-02T03:04:05Z",
		"device_page": "http://gw.example:7401/device/bed%203", "caution": caution.Text, "profile": "adult-ward-pilot"}
	for k, v := range wantAnn {
		if a.Annotations[k] != v {
			t.Errorf("annotation %s = %q, want %q", k, a.Annotations[k], v)
		}
	}
	if !a.StartsAt.Equal(onset.Add(15 * time.Second)) {
		t.Errorf("startsAt %v, want the announcement %v", a.StartsAt, onset.Add(15*time.Second))
	}
	r.waitEmpty(t, 10*time.Second)
	if v := gather(t, r.reg, "pulsefleet_notify_sent_total"); v < 2 {
		t.Errorf("sent_total = %v, want >= 2 (one per Alertmanager)", v)
	}

	ended := onset.Add(95 * time.Second)
	ep.Active, ep.EndedMS = false, ended.UnixMilli()
	r.write(t, ep)
	all, ok = recv.Wait(MinHold+30*time.Second, both("resolved"))
	if !ok {
		t.Fatalf("the end did not arrive as resolved through both; received %+v", all)
	}
	for _, d := range all {
		if d.Status == "resolved" && !d.EndsAt.Equal(ended) {
			t.Errorf("resolved endsAt %v, want the episode's end %v", d.EndsAt, ended)
		}
	}
	r.waitEmpty(t, 10*time.Second)
	if v := gather(t, r.reg, "pulsefleet_notify_queued"); v != 0 {
		t.Errorf("queued gauge %v after delivery, want 0", v)
	}
}

// Alertmanager stopped for 30 s while an alarm is announced: the
// notification waits in the outbox (the failures counted, the oldest age
// growing) and is delivered once Alertmanager is back.
func TestAlertmanagerDownForThirtySecondsDelaysButDelivers(t *testing.T) {
	if testing.Short() {
		t.Skip("30 s outage")
	}
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/am")))
	r := newRig(t, Options{URLs: []string{am.URL}, Gateway: "gw-test", BackoffMax: 2 * time.Second})
	am.Stop()
	now := time.Now()
	ep := &store.Episode{ID: 9<<32 | 4, Device: "bed-4", Condition: "desaturation", Priority: "medium",
		OnsetMS: now.Add(-20 * time.Second).UnixMilli(), AnnouncedMS: now.UnixMilli(), MinSpO2: 88, Active: true}
	r.write(t, ep)
	time.Sleep(30 * time.Second)
	if got := recv.All(); len(got) != 0 {
		t.Fatalf("received %+v while Alertmanager was down", got)
	}
	if n := r.queued(t); n != 1 {
		t.Fatalf("outbox holds %d notifications while Alertmanager is down, want 1", n)
	}
	if v := gather(t, r.reg, "pulsefleet_notify_failed_total"); v < 3 {
		t.Errorf("failed_total %v after 30 s of retries, want at least 3", v)
	}
	if v := gather(t, r.reg, "pulsefleet_notify_oldest_unsent_age_seconds"); v < 25 {
		t.Errorf("oldest unsent age %v s after 30 s down, want >= 25", v)
	}
	am.Restart()
	all, ok := recv.Wait(20*time.Second, func(all []notifytest.Delivered) bool { return count(all, "firing", ep.ID)["/am"] > 0 })
	if !ok {
		t.Fatalf("not delivered after Alertmanager came back; received %+v", all)
	}
	r.waitEmpty(t, 10*time.Second)
	if v := gather(t, r.reg, "pulsefleet_notify_oldest_unsent_age_seconds"); v != 0 {
		t.Errorf("oldest unsent age %v after delivery, want 0", v)
	}
}

// Alertmanager keeps alerts in memory only: after it restarts, an active
// alert is back within one resend interval although the outbox is empty.
func TestActiveAlertsAreResentAfterAlertmanagerRestarts(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/am")))
	r := newRig(t, Options{URLs: []string{am.URL}, Gateway: "gw-test", Resend: time.Second, BackoffMax: time.Second})
	now := time.Now()
	ep := &store.Episode{ID: 2<<32 | 1, Device: "bed-5", Condition: "signal_lost", Priority: "low",
		OnsetMS: now.Add(-10 * time.Second).UnixMilli(), AnnouncedMS: now.UnixMilli(), MinSpO2: -1, Active: true}
	r.write(t, ep)
	r.waitEmpty(t, 10*time.Second)
	am.Stop()
	am.Restart()
	deadline := time.Now().Add(10 * time.Second)
	for activeIn(t, am.URL, ep.ID) == 0 {
		if time.Now().After(deadline) {
			t.Fatal("the active alert is not back in the restarted Alertmanager after 10 resend intervals")
		}
		time.Sleep(100 * time.Millisecond)
	}
	if v := gather(t, r.reg, "pulsefleet_notify_resent_total"); v < 1 {
		t.Errorf("resent_total %v, want >= 1", v)
	}
}

// activeIn counts the alerts of an episode that Alertmanager holds active.
func activeIn(t *testing.T, base string, episode uint64) int {
	t.Helper()
	resp, err := http.Get(base + "/api/v2/alerts?active=true&filter=episode%3D%22" + strconv.FormatUint(episode, 10) + "%22")
	if err != nil {
		return 0
	}
	defer resp.Body.Close()
	var alerts []map[string]any
	if err := json.NewDecoder(resp.Body).Decode(&alerts); err != nil {
		t.Fatalf("GET /api/v2/alerts: %v", err)
	}
	return len(alerts)
}

func gather(t *testing.T, reg *prometheus.Registry, name string) float64 {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	sum := 0.0 // over label values (Alertmanagers)
	for _, mf := range mfs {
		if mf.GetName() == name {
			for _, m := range mf.GetMetric() {
				sum += m.GetGauge().GetValue() + m.GetCounter().GetValue()
			}
		}
	}
	return sum
}
