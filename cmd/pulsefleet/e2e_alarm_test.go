package main

import (
	"context"
	"os"
	"path/filepath"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// summaryDevice streams summaries and waits for acknowledgements.
type summaryDevice struct {
	st    pb.IngestService_ConnectClient
	acked chan uint64
}

func dialSummary(t *testing.T, addr, id string) *summaryDevice {
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
	if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: id, Mode: pb.Mode_MODE_SUMMARY}}}); err != nil {
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

func (d *summaryDevice) send(t *testing.T, seq uint64, tMS int64, spo2 float64) {
	t.Helper()
	pulse := 70.0
	if err := d.st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq, DeviceTimeUnixMs: tMS, Spo2Pct: &spo2, PulseBpm: &pulse}}}); err != nil {
		t.Fatal(err)
	}
}

func (d *summaryDevice) waitAck(t *testing.T, seq uint64) {
	t.Helper()
	timeout := time.After(20 * time.Second)
	for {
		select {
		case a, ok := <-d.acked:
			if !ok {
				t.Fatal("stream ended before the acknowledgement")
			}
			if a >= seq {
				return
			}
		case <-timeout:
			t.Fatalf("no acknowledgement of %d", seq)
		}
	}
}

// kill -9 with one alarm active and another pending: after the restart the
// active one is still active and is not announced again, the pending one
// keeps its onset and is announced once its delay completes.
func TestKill9WithAlarmsPendingAndActive(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data := t.TempDir()
	prof := filepath.Join(t.TempDir(), "fast.yaml")
	os.WriteFile(prof, []byte("name: fast\nconditions:\n  - kind: spo2_low\n    limit: 90\n    hysteresis: 2\n    delay: 3s\n    priority: medium\n"), 0o644)
	c := startServe(t, data, "--profile", prof)
	t0 := time.Now().Add(-time.Hour).Truncate(time.Second).UnixMilli()
	a := dialSummary(t, c.grpcAddr, "bed-9")
	for s := uint64(1); s <= 5; s++ {
		a.send(t, s, t0+int64(s-1)*1000, 85) // onset t0, announced at t0+3 s
	}
	a.waitAck(t, 5)
	b := dialSummary(t, c.grpcAddr, "bed-10")
	b.send(t, 1, t0, 86)
	b.send(t, 2, t0+1000, 86) // pending: 1 s of 3 s
	b.waitAck(t, 2)
	c.cmd.Process.Signal(syscall.SIGKILL)
	<-c.exited

	c2 := startServe(t, data, "--profile", prof)
	conn, err := grpc.NewClient(c2.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	devs, err := pb.NewFleetServiceClient(conn).ListDevices(context.Background(), &pb.ListDevicesRequest{})
	if err != nil {
		t.Fatal(err)
	}
	prio := map[string]pb.Priority{}
	for _, d := range devs.GetDevices() {
		prio[d.GetDeviceId()] = d.GetAlarmPriority()
	}
	if prio["bed-9"] != pb.Priority_PRIORITY_MEDIUM || prio["bed-10"] != pb.Priority_PRIORITY_UNSPECIFIED {
		t.Errorf("after kill -9: priorities %v, want bed-9 medium (active), bed-10 none (pending)", prio)
	}
	b = dialSummary(t, c2.grpcAddr, "bed-10")
	b.send(t, 3, t0+2000, 86)
	b.send(t, 4, t0+3000, 86) // 3 s after the onset at t0 (kept across the kill): announced
	b.waitAck(t, 4)
	a = dialSummary(t, c2.grpcAddr, "bed-9")
	a.send(t, 6, t0+5000, 85)
	a.waitAck(t, 6)
	c2.cmd.Process.Signal(syscall.SIGTERM)
	<-c2.exited

	db, err := store.Open(data, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	eps, _ := db.Episodes(store.EpisodeFilter{})
	n := map[string]int{}
	for _, e := range eps {
		n[e.Device]++
		switch e.Device {
		case "bed-9":
			if e.OnsetMS != t0 || e.AnnouncedMS != t0+3000 {
				t.Errorf("bed-9 episode %+v", e)
			}
		case "bed-10":
			if e.OnsetMS != t0 || e.AnnouncedMS != t0+3000 {
				t.Errorf("bed-10 episode %+v: onset must survive the kill", e)
			}
		}
	}
	if n["bed-9"] != 1 || n["bed-10"] != 1 {
		t.Errorf("episodes per device %v, want exactly one each", n)
	}
}
