package main

import (
	"context"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
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
	args := []string{"--profile", prof, "--alertmanager", am.URL, "--external-url", "https://ward.example/pulsefleet"}
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
