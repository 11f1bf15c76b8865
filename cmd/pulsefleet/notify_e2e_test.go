package main

import (
	"context"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/notify"
	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// dialLabelled is dialSummary for a device that introduces a model and labels.
func dialLabelled(t *testing.T, addr, id, model string, labels map[string]string) *summaryDevice {
	t.Helper()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	st, err := pb.NewIngestServiceClient(conn).Connect(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{
		DeviceId: id, Model: model, Labels: labels, Mode: pb.Mode_MODE_SUMMARY}}}); err != nil {
		t.Fatal(err)
	}
	d := &summaryDevice{st: st, acked: make(chan uint64, 1000)}
	go func() {
		for {
			m, err := st.Recv()
			if err != nil {
				close(d.acked)
				return
			}
			if a := m.GetAck(); a != nil {
				d.acked <- a.GetThroughSequence()
			}
		}
	}()
	return d
}

var queuedRe = regexp.MustCompile(`(?m)^pulsefleet_notify_queued (\S+)$`)

// queuedNotifications reads pulsefleet_notify_queued from a gateway's /metrics (-1 if absent).
func queuedNotifications(httpAddr string) float64 {
	m := queuedRe.FindStringSubmatch(scrapeMetrics(httpAddr))
	if m == nil {
		return -1
	}
	v, _ := strconv.ParseFloat(m[1], 64)
	return v
}

// The gateway binary with --alertmanager, killed with SIGKILL between an
// announcement and its delivery (Alertmanager not up yet): after the
// restart, with Alertmanager up, the announcement reaches the webhook
// receiver with the device's labels, once per episode id; the episode's
// end then arrives as resolved.
func TestKill9BeforeDeliveryDeliversAfterRestart(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/hook")))
	am.Stop() // down until after the kill: the announcement waits in the outbox
	data := t.TempDir()
	prof := filepath.Join(t.TempDir(), "fast.yaml")
	if err := os.WriteFile(prof, []byte("name: fast\nconditions:\n  - kind: spo2_low\n    limit: 90\n    hysteresis: 2\n    delay: 3s\n    priority: high\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	// The end comes soon after the firing was delivered: its resolution
	// waits for the hold (here the shortest, 5 s).
	args := []string{"--profile", prof, "--alertmanager", am.URL, "--external-url", "https://ward.example/pulsefleet", "--alertmanager-hold", "5s"}
	c := startServe(t, data, args...)
	t0 := time.Now().Add(-time.Minute).Truncate(time.Second).UnixMilli()
	d := dialLabelled(t, c.grpcAddr, "bed-11", "proto-ox2", map[string]string{"ward": "3-north"})
	for s := uint64(1); s <= 5; s++ {
		d.send(t, s, t0+int64(s-1)*1000, 85) // onset t0, announced at t0+3 s
	}
	d.waitAck(t, 5)
	deadline := time.Now().Add(10 * time.Second)
	for queuedNotifications(c.httpAddr) != 1 {
		if time.Now().After(deadline) {
			t.Fatalf("pulsefleet_notify_queued = %v, want 1 (the announcement, undelivered)", queuedNotifications(c.httpAddr))
		}
		time.Sleep(50 * time.Millisecond)
	}
	if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-c.exited
	if got := recv.All(); len(got) != 0 {
		t.Fatalf("delivered before the kill: %+v", got)
	}

	am.Restart()
	c2 := startServe(t, data, args...)
	all, ok := recv.Wait(30*time.Second, func(all []notifytest.Delivered) bool { return len(all) > 0 })
	if !ok {
		t.Fatal("the announcement made before the kill was not delivered after the restart")
	}
	a := all[0]
	want := map[string]string{"alertname": "PulsefleetAlarm", "device": "bed-11", "condition": "spo2_low", "priority": "high",
		"model": "proto-ox2", "ward": "3-north"}
	for k, v := range want {
		if a.Labels[k] != v {
			t.Errorf("label %s = %q, want %q (labels %v)", k, a.Labels[k], v, a.Labels)
		}
	}
	if a.Status != "firing" || a.Labels["gateway"] == "" || a.Annotations["device_page"] != "https://ward.example/pulsefleet/device/bed-11" ||
		a.Annotations["limit"] != "90" || a.Annotations["spo2_min"] != "85 %" {
		t.Errorf("delivered %+v", a)
	}
	if !a.StartsAt.Equal(time.UnixMilli(t0 + 3000)) {
		t.Errorf("startsAt %v, want the announcement at %v", a.StartsAt, time.UnixMilli(t0+3000).UTC())
	}

	// The end, after the restart: resolved.
	d = dialLabelled(t, c2.grpcAddr, "bed-11", "proto-ox2", map[string]string{"ward": "3-north"})
	for s := uint64(6); s <= 9; s++ {
		d.send(t, s, t0+int64(s-1)*1000, 97)
	}
	d.waitAck(t, 9)
	all, ok = recv.Wait(30*time.Second, func(all []notifytest.Delivered) bool {
		for _, a := range all {
			if a.Status == "resolved" {
				return true
			}
		}
		return false
	})
	if !ok {
		t.Fatalf("the end was not delivered as resolved; received %+v", all)
	}
	firing := map[string]bool{}
	for _, a := range all {
		if a.Status == "firing" && a.Labels["device"] == "bed-11" {
			firing[a.Labels["episode"]] = true
		}
	}
	if len(firing) != 1 {
		t.Errorf("firing notifications for %d distinct episode ids %v, want 1", len(firing), firing)
	}
	c2.cmd.Process.Signal(syscall.SIGTERM)
	<-c2.exited
}

// An alarm announced AND ended while Alertmanager is down, then the
// gateway killed with SIGKILL: after the restart, with Alertmanager up,
// the receiver gets the episode firing, marked delivered late with its end
// time, and only after --alertmanager-hold its resolution (an alert that
// reached Alertmanager already resolved would never be notified).
func TestKill9AfterAnAlarmEndedUndeliveredSendsItFiringThenResolved(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	recv := notifytest.NewReceiver(t)
	am := notifytest.Start(t, notifytest.Config(recv.URL("/hook")))
	am.Stop()
	data := t.TempDir()
	prof := filepath.Join(t.TempDir(), "fast.yaml")
	if err := os.WriteFile(prof, []byte("name: fast\nconditions:\n  - kind: spo2_low\n    limit: 90\n    hysteresis: 2\n    delay: 3s\n    priority: high\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	const hold = 6 * time.Second
	args := []string{"--profile", prof, "--alertmanager", am.URL, "--alertmanager-hold", hold.String()}
	c := startServe(t, data, args...)
	t0 := time.Now().Add(-time.Minute).Truncate(time.Second).UnixMilli()
	d := dialLabelled(t, c.grpcAddr, "bed-12", "proto-ox2", nil)
	for s := uint64(1); s <= 9; s++ {
		v := 85.0 // onset t0, announced at t0+3 s
		if s > 5 {
			v = 97 // back above limit+hysteresis: ended
		}
		d.send(t, s, t0+int64(s-1)*1000, v)
	}
	d.waitAck(t, 9)
	deadline := time.Now().Add(10 * time.Second)
	for queuedNotifications(c.httpAddr) != 1 {
		if time.Now().After(deadline) {
			t.Fatalf("pulsefleet_notify_queued = %v, want 1", queuedNotifications(c.httpAddr))
		}
		time.Sleep(50 * time.Millisecond)
	}
	time.Sleep(200 * time.Millisecond) // the end's write, if it was not in the same batch
	if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-c.exited
	db, err := store.Open(data, store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	ents, _, err := db.Outbox(0)
	var ep store.Episode
	if err == nil && len(ents) == 1 {
		ep, err = db.Episode(ents[0].Episode)
	}
	db.Close()
	if err != nil || len(ents) != 1 || ep.Active || ep.EndedMS == 0 || ep.AnnouncedMS == 0 {
		t.Fatalf("before the restart: outbox %+v, episode %+v, err %v; want one entry for an announced, ended episode", ents, ep, err)
	}

	am.Restart()
	c2 := startServe(t, data, args...)
	id := strconv.FormatUint(ep.ID, 10)
	first := func(status string) func([]notifytest.Delivered) bool {
		return func(all []notifytest.Delivered) bool {
			for _, a := range all {
				if a.Status == status && a.Labels["episode"] == id {
					return true
				}
			}
			return false
		}
	}
	all, ok := recv.Wait(30*time.Second, first("firing"))
	if !ok {
		t.Fatalf("the alarm that ended undelivered never arrived firing after the restart; received %+v", all)
	}
	firedSeen := time.Now()
	if first("resolved")(all) {
		t.Fatalf("its resolution arrived with the firing notification: %+v", all)
	}
	ended := time.UnixMilli(ep.EndedMS).UTC().Format(time.RFC3339Nano)
	for _, a := range all {
		if a.Status == "firing" && !strings.Contains(a.Annotations[notify.LateAnnotation], "ended at "+ended) {
			t.Errorf("firing notification without %s naming the end %s: %v", notify.LateAnnotation, ended, a.Annotations)
		}
	}
	all, ok = recv.Wait(hold+30*time.Second, first("resolved"))
	if !ok {
		t.Fatalf("never resolved; received %+v", all)
	}
	if gap := time.Since(firedSeen); gap < hold-2*time.Second {
		t.Errorf("resolved %v after the firing notification, want about the hold %v", gap, hold)
	}
	c2.cmd.Process.Signal(syscall.SIGTERM)
	<-c2.exited
}
