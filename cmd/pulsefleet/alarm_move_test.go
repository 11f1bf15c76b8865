package main

import (
	"context"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// openOwned opens a stream of device id at the gateway that takes it:
// from gateway addr, following redirects, retrying while a fence is still
// held (a killed gateway's, until its lease expires).
func openOwned(t *testing.T, ctx context.Context, addr, id string, within time.Duration) (*clockDevice, string) {
	t.Helper()
	deadline, start := time.Now().Add(within), addr
	for {
		conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { conn.Close() })
		st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
		if err == nil {
			err = st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{
				DeviceId: id, Model: "move-test", Mode: pb.Mode_MODE_SUMMARY}}})
		}
		var m *pb.ConnectResponse
		if err == nil {
			m, err = st.Recv()
		}
		switch {
		case err == nil && m.GetWelcome() != nil:
			return &clockDevice{t: t, st: st, wel: m.GetWelcome()}, addr
		case err == nil && m.GetRedirect() != nil:
			addr = m.GetRedirect().GetAddress()
			continue
		}
		if time.Now().After(deadline) {
			t.Fatalf("device %s not taken by any gateway within %v: %v", id, within, err)
		}
		addr = start // the redirect named a gateway that is gone
		time.Sleep(200 * time.Millisecond)
	}
}

func announcedOn(f *etcdFleet, i int, cond string) string {
	return findLine(scrapeMetrics(f.kids[i].httpAddr), `pulsefleet_alarm_announcements_total{condition="`+cond+`"`)
}

// An alarm announced by a gateway that is then killed is not announced
// again by the survivor that takes its device: the survivor adopts the
// alarm state the dead gateway published to etcd, and the episode goes on
// there (active, not announced a second time), though the device stays
// below the limit for longer than the alarm condition delay after the move.
func TestFleetOnEtcdAlarmNotAnnouncedTwiceAcrossKill9(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 2)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	const id = "move-0001"
	d, owner := openOwned(t, ctx, f.addrs[0], id, 10*time.Second)
	first := slices.Index(f.addrs, owner)
	t0 := time.Now().Add(-90 * time.Second).Truncate(time.Second).UnixMilli()
	// 40 s at SpO2 80: spo2_low is announced after its 15 s delay
	// (adult-ward-pilot).
	for i := int64(0); i < 40; i++ {
		d.send(uint64(i+1), t0+i*1000, 80)
	}
	for d.acked < 40 {
		d.recv()
	}
	if l := announcedOn(f, first, "spo2_low"); !strings.HasSuffix(l, " 1") {
		t.Fatalf("gateway %d: %q, want spo2_low announced once before the kill", first, l)
	}
	time.Sleep(500 * time.Millisecond) // the snapshot's publication: one etcd round trip
	f.kill(first)
	other := 1 - first
	d2, _ := openOwned(t, ctx, f.addrs[other], id, 20*time.Second)
	// 40 more seconds below the limit at the survivor.
	for i := int64(40); i < 80; i++ {
		d2.send(uint64(i+1), t0+i*1000, 80)
	}
	for d2.acked < 80 {
		d2.recv()
	}
	if l := announcedOn(f, other, "spo2_low"); l != "" && !strings.HasSuffix(l, " 0") {
		t.Errorf("survivor: %q, want spo2_low not announced again (the episode moved with the device)", l)
	}
	gd, err := fleetClient(t, f.addrs[other]).GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Contains(gd.GetDevice().GetActiveConditions(), "spo2_low") {
		t.Errorf("survivor: active conditions %v, want spo2_low (the episode goes on)", gd.GetDevice().GetActiveConditions())
	}
}
