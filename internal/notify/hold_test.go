package notify

import (
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// slowConfig is notifytest.Config with a longer group_wait: Alertmanager
// holds a new group's first notification that long.
func slowConfig(t *testing.T, webhook string, groupWait time.Duration) string {
	t.Helper()
	c := notifytest.Config(webhook)
	if !strings.Contains(c, "group_wait: 1s") {
		t.Fatalf("notifytest.Config changed: %s", c)
	}
	return strings.Replace(c, "group_wait: 1s", "group_wait: "+groupWait.String(), 1)
}

// firedTimes waits until the outbox entry of episode holds a firing time
// for target and returns it.
func firedTime(t *testing.T, db *store.DB, episode uint64, target string) int64 {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		ents, _, err := db.Outbox(0)
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range ents {
			if e.Episode == episode && e.Fired[target] != 0 {
				return e.Fired[target]
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("episode %d: no firing time recorded for %s after 30 s; outbox %+v", episode, target, ents)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// An alarm whose firing state Alertmanager accepted and that ends while
// Alertmanager still waits out its group_wait: the resolution is held until
// the alert has been firing there for the hold, so the receiver gets the
// alarm, then its end. (Sent at once, the resolution would reach
// Alertmanager before the group's first notification, which then never
// goes out.)
func TestShortAlarmEndingWithinGroupWaitIsNotifiedThenResolved(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, slowConfig(t, recv.URL("/am"), 5*time.Second))
	const hold = 10 * time.Second
	r := newRig(t, Options{URLs: []string{am.URL}, Gateway: "gw-test", Hold: hold, BackoffMax: time.Second})
	now := time.Now()
	ep := &store.Episode{ID: 7<<32 | 1, Device: "bed-9", Condition: "spo2_low", Priority: "high",
		OnsetMS: now.Add(-15 * time.Second).UnixMilli(), AnnouncedMS: now.UnixMilli(), MinSpO2: 87, Limit: 90, Active: true}
	r.write(t, ep)
	r.waitEmpty(t, 30*time.Second) // Alertmanager accepted it firing: the entry is gone
	firingAccepted := time.Now()
	ended := time.Now().Truncate(time.Millisecond)
	ep.Active, ep.EndedMS = false, ended.UnixMilli()
	r.write(t, ep)
	if time.Since(firingAccepted) > 4*time.Second {
		t.Skipf("the end was written %v after the firing was accepted, not within the 5 s group_wait (machine too loaded to test this)", time.Since(firingAccepted))
	}
	all, ok := recv.Wait(60*time.Second, func(all []notifytest.Delivered) bool { _, ok := firstAt(all, "resolved", ep.ID); return ok })
	if !ok {
		t.Fatalf("no resolved notification; received %+v", all)
	}
	f, ok := firstAt(all, "firing", ep.ID)
	if !ok {
		t.Fatalf("the alarm was never notified firing, only %+v", all)
	}
	if f.Labels["device"] != "bed-9" {
		t.Errorf("firing notification labels %v", f.Labels)
	}
	if r, _ := firstAt(all, "resolved", ep.ID); !r.EndsAt.Equal(ended) {
		t.Errorf("resolved endsAt %v, want the episode's end %v", r.EndsAt, ended)
	}
	r.waitEmpty(t, 10*time.Second)
	if ents, _, _ := r.db.Outbox(0); len(ents) != 0 {
		t.Errorf("outbox %+v after the resolution", ents)
	}
}

// An Alertmanager restarted while it holds a late firing alert (before its
// group_wait let the first notification out) gets it again with the next
// resend, so the receiver still gets the alarm firing, then resolved.
func TestAlertmanagerRestartDuringTheHoldKeepsTheLateAlarm(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, slowConfig(t, recv.URL("/am"), 8*time.Second))
	const hold = 25 * time.Second
	r := newRig(t, Options{URLs: []string{am.URL}, Gateway: "gw-test", Hold: hold, Resend: 2 * time.Second, BackoffMax: time.Second})
	now := time.Now()
	ended := now.Truncate(time.Millisecond)
	// Announced and ended in one write: Alertmanager never had it firing.
	// Announced a moment ago: Alertmanager flushes at once an alert that
	// started more than its group_wait ago.
	ep := &store.Episode{ID: 8<<32 | 3, Device: "bed-10", Condition: "spo2_low", Priority: "high",
		OnsetMS: now.Add(-10 * time.Second).UnixMilli(), AnnouncedMS: now.Add(-time.Second).UnixMilli(), EndedMS: ended.UnixMilli(), MinSpO2: 84, Limit: 90}
	r.write(t, ep)
	firedMS := firedTime(t, r.db, ep.ID, am.URL)
	am.Stop() // the late firing alert is lost with the process
	if since := time.Since(time.UnixMilli(firedMS)); since > 7*time.Second {
		t.Skipf("Alertmanager stopped %v after it accepted the late alert, past its 8 s group_wait (machine too loaded to test this)", since)
	}
	if _, ok := firstAt(recv.All(), "firing", ep.ID); ok {
		t.Fatal("notified before the group_wait was over")
	}
	am.Restart()
	all, ok := recv.Wait(hold+30*time.Second, func(all []notifytest.Delivered) bool { _, ok := firstAt(all, "resolved", ep.ID); return ok })
	if !ok {
		t.Fatalf("no resolved notification; received %+v", all)
	}
	f, ok := firstAt(all, "firing", ep.ID)
	if !ok {
		t.Fatalf("the late alarm was lost with the Alertmanager restart: only %+v", all)
	}
	if !strings.Contains(f.Annotations[LateAnnotation], "already ended") {
		t.Errorf("firing notification annotations %v, want %s", f.Annotations, LateAnnotation)
	}
	r.waitEmpty(t, 10*time.Second)
}
