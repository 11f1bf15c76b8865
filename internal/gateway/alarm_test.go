package gateway

import (
	"context"
	"strings"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// watchTransitions collects episode transitions until the returned stop is called.
func watchTransitions(t *testing.T, h *harness) (get func() []*pb.EpisodeEvent, stop func()) {
	ctx, cancel := context.WithCancel(context.Background())
	ws, err := h.fleet().WatchEpisodes(ctx, &pb.WatchEpisodesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	var mu sync.Mutex
	var evs []*pb.EpisodeEvent
	done := make(chan struct{})
	go func() {
		defer close(done)
		for {
			m, err := ws.Recv()
			if err != nil {
				return
			}
			mu.Lock()
			evs = append(evs, m.GetEvent())
			mu.Unlock()
		}
	}()
	return func() []*pb.EpisodeEvent {
			mu.Lock()
			defer mu.Unlock()
			return append([]*pb.EpisodeEvent(nil), evs...)
		}, func() {
			cancel()
			<-done
		}
}

func count(evs []*pb.EpisodeEvent, device, transition string) int {
	n := 0
	for _, e := range evs {
		if e.GetEpisode().GetDeviceId() == device && e.GetTransition() == transition {
			n++
		}
	}
	return n
}

// An alarm announced before a restart stays active after it and is not
// announced again; one pending before the restart keeps its onset and is
// announced once, when its alarm condition delay (IEC 60601-1-8: the time
// from the triggering event to the alarm condition existing) completes.
func TestAlarmsSurviveRestartWithoutDoubleAnnouncement(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	get, stop := watchTransitions(t, h)
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second).UnixMilli()

	a, _ := h.connect(t, summaryIntro("bed-1"))
	for s := uint64(1); s <= 6; s++ { // 85 % from t0: present at t0, announced at t0+3 s
		a.send(summary(s, t0+int64(s-1)*1000, 85))
	}
	a.waitAck(6)
	b, _ := h.connect(t, summaryIntro("bed-2"))
	b.send(summary(1, t0, 95))
	b.send(summary(2, t0+1000, 87)) // onset of bed-2's spo2_low
	b.send(summary(3, t0+2000, 87)) // pending: present 1 s of 3 s
	b.waitAck(3)
	waitUntil(t, func() bool { return count(get(), "bed-1", "announced") == 1 }, "bed-1 announced")

	// An operator acknowledges bed-1 (audited with who).
	ctx := auth.WithActor(context.Background(), "nurse-ilse")
	if _, err := h.g.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{DeviceId: "bed-1"}); err != nil {
		t.Fatal(err)
	}
	stop()
	a.close()
	b.close()
	h.restart()

	get, stop = watchTransitions(t, h)
	defer stop()
	devs, err := h.fleet().ListDevices(context.Background(), &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range devs.Devices {
		switch d.GetDeviceId() {
		case "bed-1":
			if d.GetAlarmPriority() != pb.Priority_PRIORITY_MEDIUM || len(d.GetActiveConditions()) != 1 {
				t.Errorf("bed-1 after restart: priority %v conditions %v, want medium spo2_low", d.GetAlarmPriority(), d.GetActiveConditions())
			}
		case "bed-2":
			if d.GetAlarmPriority() != pb.Priority_PRIORITY_UNSPECIFIED {
				t.Errorf("bed-2 after restart: priority %v, want none yet (pending)", d.GetAlarmPriority())
			}
		}
	}
	a, _ = h.connect(t, summaryIntro("bed-1"))
	a.send(summary(7, t0+6000, 84))
	a.send(summary(8, t0+7000, 93)) // 93 >= 90 + 2: the condition clears
	a.waitAck(8)
	b, _ = h.connect(t, summaryIntro("bed-2"))
	b.send(summary(4, t0+3000, 87))
	b.send(summary(5, t0+4000, 87)) // present 3 s since onset at t0+1 s: announced now
	b.waitAck(5)
	waitUntil(t, func() bool { return count(get(), "bed-2", "announced") == 1 && count(get(), "bed-1", "ended") == 1 }, "bed-2 announced, bed-1 ended")
	if n := count(get(), "bed-1", "announced"); n != 0 {
		t.Errorf("bed-1 announced %d more times after the restart", n)
	}

	eps, err := h.db.Episodes(store.EpisodeFilter{})
	if err != nil {
		t.Fatal(err)
	}
	byDev := map[string][]store.Episode{}
	for _, e := range eps {
		byDev[e.Device] = append(byDev[e.Device], e)
	}
	if e := byDev["bed-1"]; len(e) != 1 || e[0].OnsetMS != t0 || e[0].AnnouncedMS != t0+3000 || e[0].EndedMS != t0+7000 ||
		e[0].AckedBy != "nurse-ilse" || e[0].MinSpO2 != 84 || e[0].Active {
		t.Errorf("bed-1 episodes: %+v", e)
	}
	if e := byDev["bed-2"]; len(e) != 1 || e[0].OnsetMS != t0+1000 || e[0].AnnouncedMS != t0+4000 || !e[0].Active {
		t.Errorf("bed-2 episodes: %+v", e)
	}
	au, _ := h.db.Audit(0, "alarm.", 0)
	if len(au) != 1 || au[0].Actor != "nurse-ilse" || au[0].Device != "bed-1" {
		t.Errorf("audit: %+v", au)
	}
}

// Pausing stops announcement to people but never logging: an alarm that
// comes due during a pause is stored, marked as announced while paused.
func TestPauseKeepsLogging(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second).UnixMilli()
	d, _ := h.connect(t, summaryIntro("home-3"))
	d.send(summary(1, t0, 96))
	d.waitAck(1)
	ctx := auth.WithActor(context.Background(), "op-jun")
	if _, err := h.g.PauseAlarms(ctx, &pb.PauseAlarmsRequest{DeviceId: "home-3", DurationS: 60}); err != nil {
		t.Fatal(err)
	}
	for s := uint64(2); s <= 8; s++ {
		d.send(summary(s, t0+int64(s-1)*1000, 82))
	}
	d.waitAck(8)
	eps, _ := h.db.Episodes(store.EpisodeFilter{Device: "home-3"})
	if len(eps) != 1 || eps[0].AnnouncedMS == 0 {
		t.Fatalf("episodes during a pause: %+v (an alarm during a pause must still be logged)", eps)
	}
	au, _ := h.db.Audit(0, "alarm.paused", 0)
	if len(au) != 1 || au[0].Actor != "op-jun" {
		t.Errorf("pause audit: %+v", au)
	}
	if _, err := h.g.PauseAlarms(ctx, &pb.PauseAlarmsRequest{DeviceId: "home-3", DurationS: 7200}); err == nil {
		t.Error("a pause longer than the profile's pause_max must be refused")
	}
}

// Setting a profile is validated, stored, audited and applied.
func TestSetAlarmProfile(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	ctx := auth.WithActor(context.Background(), "admin-ro")
	_, err := h.g.SetAlarmProfile(ctx, &pb.SetAlarmProfileRequest{ProfileYaml: "name: x\nconditions:\n  - kind: spo2_low\n    limit: 90\n    delay: -5s\n    priority: medium\n"})
	if err == nil {
		t.Fatal("a negative delay must be refused")
	}
	p := testProfile(t)
	p.Name = "quieter"
	p.Conditions[0].Limit = 88
	b, _ := p.Marshal()
	if _, err := h.g.SetAlarmProfile(ctx, &pb.SetAlarmProfileRequest{ProfileYaml: string(b), Reason: "pilot week 2"}); err != nil {
		t.Fatal(err)
	}
	got, err := h.g.GetAlarmProfile(ctx, &pb.GetAlarmProfileRequest{})
	if err != nil || got.GetName() != "quieter" {
		t.Fatalf("default after set: %v %v", got, err)
	}
	h.restart()
	got, err = h.g.GetAlarmProfile(ctx, &pb.GetAlarmProfileRequest{})
	if err != nil || got.GetName() != "quieter" {
		t.Errorf("default after restart: %v %v", got, err)
	}
	back, err := alarms.ParseProfile([]byte(got.GetProfileYaml()))
	if err != nil || back.Conditions[0].Limit != 88 {
		t.Errorf("stored profile: %v %v", back, err)
	}
	au, _ := h.db.Audit(0, "profile.set", 0)
	if len(au) != 1 || au[0].Actor != "admin-ro" {
		t.Errorf("audit: %+v", au)
	}
}

func waitUntil(t *testing.T, cond func() bool, what string) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// A built-in profile can be set by its name alone (issue 15: before, the
// name was parsed as YAML and refused with "want a mapping"); the full YAML
// is stored, survives a restart and is audited like any other.
func TestSetAlarmProfileByBuiltinName(t *testing.T) {
	h := newHarness(t, func(o *Options) { o.DefaultProfile = testProfile(t) })
	ctx := auth.WithActor(context.Background(), "admin-ro")
	if _, err := h.g.SetAlarmProfile(ctx, &pb.SetAlarmProfileRequest{ProfileYaml: "home-overnight\n", Reason: "at home"}); err != nil {
		t.Fatal(err)
	}
	h.restart()
	got, err := h.g.GetAlarmProfile(ctx, &pb.GetAlarmProfileRequest{})
	if err != nil || got.GetName() != "home-overnight" || !strings.Contains(got.GetProfileYaml(), "conditions:") {
		t.Fatalf("after set by name and restart: %v %v", got, err)
	}
	au, _ := h.db.Audit(0, "profile.set", 0)
	if len(au) != 1 || !strings.Contains(au[0].Detail, "home-overnight") {
		t.Errorf("audit: %+v", au)
	}
	_, err = h.g.SetAlarmProfile(ctx, &pb.SetAlarmProfileRequest{ProfileYaml: "no-such-profile"})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "adult-ward-pilot") {
		t.Errorf("unknown name: %v; want InvalidArgument listing the built-in names", err)
	}
}
