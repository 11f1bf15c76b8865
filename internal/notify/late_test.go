package notify

import (
	"context"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// firstAt returns the first delivery of an episode with the given status
// (ok false when there is none).
func firstAt(all []notifytest.Delivered, status string, episode uint64) (notifytest.Delivered, bool) {
	for _, a := range all {
		if a.Status == status && count([]notifytest.Delivered{a}, status, episode)[a.Receiver] > 0 {
			return a, true
		}
	}
	return notifytest.Delivered{}, false
}

// lateThenResolved waits for the episode's late firing notification and
// then its resolution; it checks the late annotation, that the resolution
// came after the firing one by about the hold, and the resolution's endsAt.
func lateThenResolved(t *testing.T, recv *notifytest.Receiver, episode uint64, ended time.Time, hold time.Duration) {
	t.Helper()
	all, ok := recv.Wait(30*time.Second, func(all []notifytest.Delivered) bool { _, ok := firstAt(all, "firing", episode); return ok })
	if !ok {
		t.Fatalf("the episode that ended while Alertmanager was unreachable never arrived firing; received %+v", all)
	}
	firedAt := time.Now()
	if _, ok := firstAt(all, "resolved", episode); ok {
		t.Fatalf("resolved arrived together with the late firing notification: %+v", all)
	}
	f, _ := firstAt(all, "firing", episode)
	want := "already ended at " + ended.UTC().Format(time.RFC3339Nano)
	if !strings.Contains(f.Annotations[LateAnnotation], want) || !strings.Contains(f.Annotations["summary"], "delivered late") {
		t.Errorf("late firing annotations %v, want %s containing %q and a summary saying delivered late", f.Annotations, LateAnnotation, want)
	}
	all, ok = recv.Wait(hold+30*time.Second, func(all []notifytest.Delivered) bool { _, ok := firstAt(all, "resolved", episode); return ok })
	if !ok {
		t.Fatalf("the late alert was never resolved; received %+v", all)
	}
	// The receiver's own timing: group_wait/interval 1 s on both sides.
	if gap := time.Since(firedAt); gap < hold-2*time.Second {
		t.Errorf("resolved %v after the late firing notification, want about the hold %v", gap, hold)
	}
	r, _ := firstAt(all, "resolved", episode)
	if !r.EndsAt.Equal(ended) {
		t.Errorf("resolved endsAt %v, want the episode's end %v", r.EndsAt, ended)
	}
}

// Alertmanager unreachable while an episode is announced AND ended: once
// it is back, the receiver gets the episode firing (marked delivered
// late), and its resolution only after the hold, so Alertmanager notified
// the alarm instead of receiving it already resolved.
func TestEndedWhileAlertmanagerDownArrivesFiringThenResolved(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/am")))
	const hold = 6 * time.Second
	r := newRig(t, Options{URLs: []string{am.URL}, Gateway: "gw-test", Hold: hold, BackoffMax: time.Second})
	am.Stop()
	now := time.Now()
	ep := &store.Episode{ID: 4<<32 | 2, Device: "bed-6", Condition: "spo2_low", Priority: "high",
		OnsetMS: now.Add(-20 * time.Second).UnixMilli(), AnnouncedMS: now.Add(-5 * time.Second).UnixMilli(), MinSpO2: 86, Limit: 90, Active: true}
	r.write(t, ep)
	ended := now.Truncate(time.Millisecond)
	ep.Active, ep.EndedMS = false, ended.UnixMilli()
	r.write(t, ep)
	time.Sleep(3 * time.Second) // a few failed attempts
	am.Restart()
	lateThenResolved(t, recv, ep.ID, ended, hold)
	r.waitEmpty(t, 10*time.Second)
}

// The hold survives a gateway restart: the late firing state's acceptance
// time is in the outbox, so a notifier started on the reopened store sends
// the resolution when the hold that began before the restart is over (not
// at once, and not a whole hold after the restart).
func TestHoldSurvivesRestart(t *testing.T) {
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/am")))
	dir := t.TempDir()
	const hold = 8 * time.Second
	open := func() (*store.DB, *Notifier, func()) {
		db, err := store.Open(dir, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		n, err := New(Options{URLs: []string{am.URL}, Store: db, Gateway: "gw-test", Hold: hold, BackoffMax: time.Second})
		if err != nil {
			t.Fatal(err)
		}
		db.EnableOutbox(n.Kick)
		ctx, cancel := context.WithCancel(context.Background())
		var wg sync.WaitGroup
		wg.Add(1)
		go func() { defer wg.Done(); _ = n.Run(ctx) }()
		return db, n, func() { cancel(); wg.Wait(); db.Close() }
	}
	db, _, stop := open()
	now := time.Now()
	ended := now.Truncate(time.Millisecond)
	// Announced and ended in one write (as after a gateway crash, or a
	// batch holding both): Alertmanager never had it firing.
	ep := &store.Episode{ID: 6<<32 | 1, Device: "bed-8", Condition: "pulse_high", Priority: "medium",
		OnsetMS: now.Add(-30 * time.Second).UnixMilli(), AnnouncedMS: now.Add(-20 * time.Second).UnixMilli(), EndedMS: ended.UnixMilli(), MinSpO2: 95}
	if err := db.Write(&store.Batch{Episodes: []*store.Episode{ep}}); err != nil {
		t.Fatal(err)
	}
	if _, ok := recv.Wait(20*time.Second, func(all []notifytest.Delivered) bool { _, ok := firstAt(all, "firing", ep.ID); return ok }); !ok {
		t.Fatal("late firing notification not received")
	}
	ents, _, err := db.Outbox(0)
	if err != nil || len(ents) != 1 || ents[0].Fired[am.URL] == 0 || len(ents[0].Delivered) != 0 {
		t.Fatalf("outbox during the hold: %+v, %v; want the entry with its firing time and not delivered", ents, err)
	}
	firedMS := ents[0].Fired[am.URL]
	stop()
	time.Sleep(2 * time.Second)
	_, _, stop = open()
	defer stop()
	all, ok := recv.Wait(hold+20*time.Second, func(all []notifytest.Delivered) bool { _, ok := firstAt(all, "resolved", ep.ID); return ok })
	if !ok {
		t.Fatalf("not resolved after the restart; received %+v", all)
	}
	since := time.Since(time.UnixMilli(firedMS))
	if since < hold {
		t.Errorf("resolved %v after the firing state was accepted, want at least the hold %v", since, hold)
	}
	if since > hold+8*time.Second {
		t.Errorf("resolved %v after the firing state was accepted: the hold restarted with the gateway (hold %v)", since, hold)
	}
	if c := count(all, "firing", ep.ID)["/am"]; c != 1 {
		t.Errorf("%d firing notifications, want 1 (the restart must not send it firing again)", c)
	}
}

// Late keeps the labels, fires until the given time and says when the
// episode ended; Build's alert is not changed.
func TestLate(t *testing.T) {
	start := time.Date(2026, 12, 2, 10, 0, 0, 0, time.UTC)
	e := &store.Episode{ID: 3, Device: "d", Condition: "spo2_low", Priority: "high", OnsetMS: start.UnixMilli(),
		AnnouncedMS: start.UnixMilli(), EndedMS: start.Add(time.Minute).UnixMilli(), MinSpO2: 85}
	b := Build(e, nil, "gw", "", start.Add(time.Hour))
	until := start.Add(2 * time.Hour)
	l := Late(b[0], until)
	if l.EndsAt != "2026-12-02T12:00:00Z" || l.Labels["episode"] != "3" || l.StartsAt != b[0].StartsAt {
		t.Errorf("late %+v", l)
	}
	if l.Annotations[LateAnnotation] == "" || !strings.Contains(l.Annotations[LateAnnotation], "2026-12-02T10:01:00Z") {
		t.Errorf("late annotation %q", l.Annotations[LateAnnotation])
	}
	if _, ok := b[0].Annotations[LateAnnotation]; ok || b[0].EndsAt != "2026-12-02T10:01:00Z" {
		t.Errorf("Build's alert changed: %+v", b[0])
	}
	if CheckHold(MinHold-time.Second) == nil || CheckHold(MaxHold+time.Second) == nil || CheckHold(DefaultHold) != nil {
		t.Error("CheckHold bounds")
	}
}
