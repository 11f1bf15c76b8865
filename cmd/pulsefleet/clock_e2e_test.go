package main

import (
	"context"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// clockDevice drives one summary device over a real stream and collects
// what the gateway answers.
type clockDevice struct {
	t     *testing.T
	st    pb.IngestService_ConnectClient
	rejs  []*pb.Rejection
	acked uint64
	wel   *pb.Welcome
}

func connectClockDevice(t *testing.T, ctx context.Context, conn *grpc.ClientConn, id string) *clockDevice {
	t.Helper()
	st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
	if err != nil {
		t.Fatal(err)
	}
	d := &clockDevice{t: t, st: st}
	if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{
		DeviceId: id, Model: "clock-test", Mode: pb.Mode_MODE_SUMMARY}}}); err != nil {
		t.Fatal(err)
	}
	for d.wel == nil {
		d.recv()
	}
	return d
}

func (d *clockDevice) recv() {
	d.t.Helper()
	m, err := d.st.Recv()
	if err != nil {
		d.t.Fatalf("stream: %v", err)
	}
	switch k := m.Kind.(type) {
	case *pb.ConnectResponse_Welcome:
		d.wel = k.Welcome
	case *pb.ConnectResponse_Ack:
		d.acked = max(d.acked, k.Ack.GetThroughSequence())
	case *pb.ConnectResponse_Rejection:
		d.rejs = append(d.rejs, k.Rejection)
	}
}

func (d *clockDevice) send(seq uint64, tMS int64, spo2 float64) {
	d.t.Helper()
	q, pulse := 0.9, 70.0
	if err := d.st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq, DeviceTimeUnixMs: tMS,
		Spo2Pct: &spo2, PulseBpm: &pulse, Quality: &q}}}); err != nil {
		d.t.Fatal(err)
	}
}

// A device clock stamped 300 days ahead cannot silence a real `serve`
// process: the stamped summary is refused naming the field, 40 s at SpO2 80
// with a correct clock raise spo2_low (the built-in adult-ward-pilot, 15 s
// delay), and after kill -9 and a restart the alarm is still active, no
// episode starts in the future, and the device's next second is accepted.
func TestServeDeviceClockJumpSurvivesKill9(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	data := t.TempDir()
	c := startServe(t, data)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	conn, err := grpc.NewClient(c.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	d := connectClockDevice(t, ctx, conn, "jumpy")
	t0 := time.Now().Add(-50 * time.Second).Truncate(time.Second).UnixMilli()
	d.send(1, time.Now().Add(300*24*time.Hour).UnixMilli(), 97)
	for i := int64(0); i < 40; i++ {
		d.send(uint64(i+2), t0+i*1000, 80)
	}
	for d.acked < 41 {
		d.recv()
	}
	if len(d.rejs) != 1 || d.rejs[0].GetSequence() != 1 || d.rejs[0].GetReason() != pb.RejectReason_REJECT_REASON_INVALID_FIELD ||
		d.rejs[0].GetField() != "summary.device_time_unix_ms" {
		t.Fatalf("rejections %v, want sequence 1 refused naming summary.device_time_unix_ms", d.rejs)
	}
	conn.Close()
	if err := c.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	<-c.exited

	c2 := startServe(t, data)
	conn2, err := grpc.NewClient(c2.grpcAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn2.Close()
	fleet := pb.NewFleetServiceClient(conn2)
	gd, err := fleet.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: "jumpy"})
	if err != nil {
		t.Fatal(err)
	}
	found := false
	for _, cond := range gd.GetDevice().GetActiveConditions() {
		found = found || cond == "spo2_low"
	}
	if !found {
		t.Errorf("after kill -9 and restart: active conditions %v, want spo2_low", gd.GetDevice().GetActiveConditions())
	}
	eps, err := fleet.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: "jumpy"})
	if err != nil {
		t.Fatal(err)
	}
	bound := time.Now().Add(5 * time.Second).UnixMilli()
	for _, e := range eps.GetEpisodes() {
		if e.GetOnsetUnixMs() > bound {
			t.Errorf("episode %s starts %v in the future", e.GetCondition(), time.Duration(e.GetOnsetUnixMs()-time.Now().UnixMilli())*time.Millisecond)
		}
	}
	d = connectClockDevice(t, ctx, conn2, "jumpy")
	if d.wel.GetResumeAfterSequence() != 41 {
		t.Fatalf("resume after %d, want 41", d.wel.GetResumeAfterSequence())
	}
	d.send(42, t0+40_000, 80)
	for d.acked < 42 && len(d.rejs) == 0 {
		d.recv()
	}
	if len(d.rejs) != 0 {
		t.Errorf("the next second after the restart was refused: %v", d.rejs)
	}
	d.st.CloseSend()
	c2.cmd.Process.Signal(syscall.SIGTERM)
	if err := <-c2.exited; err != nil {
		t.Fatalf("serve after SIGTERM: %v", err)
	}
}
