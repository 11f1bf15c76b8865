package main

import (
	"context"
	"fmt"
	"math"
	"net/http"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/sim"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// linearCurve is a calibration SpO2 = a - 25 R. The textbook line is
// a = 110 (estimator.Empirical); a lower a reads lower for the same R, so a
// trend point shows which curve made it.
func linearCurve(name string, a int) string {
	return fmt.Sprintf("name: %s\nversion: 1\nmodel: linear\ncoefficients: [%d, -25]\nratio_min: 0.2\nratio_max: 2\n", name, a)
}

// waitCurve waits until gateway fl lists device with calibration ref and a
// latest trend point made after `after` that reads a - 25 R; it returns
// how long after `after` each was first seen.
func waitCurve(t *testing.T, fl pb.FleetServiceClient, device, ref string, a float64, after time.Time, within time.Duration) (named, value time.Duration) {
	t.Helper()
	seen := false
	for {
		r, err := fl.GetDevice(context.Background(), &pb.GetDeviceRequest{DeviceId: device})
		d := r.GetDevice()
		if err == nil && d.GetCalibration() == ref && !seen {
			seen, named = true, time.Since(after)
		}
		if p := d.GetLatest(); seen && p != nil && p.Spo2Pct != nil && p.Ratio != nil && p.GetTimeUnixMs() > after.UnixMilli() &&
			math.Abs(p.GetSpo2Pct()-(a-25*p.GetRatio())) < 0.2 {
			return named, time.Since(after)
		}
		if time.Since(after) > within {
			t.Fatalf("device %s: calibration %q, latest %v (err %v) %v after the change; want %s and SpO2 = %v - 25 R", device, d.GetCalibration(), d.GetLatest(), err, within, ref, a)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// A calibration put and assigned (to the devices' model) through one
// gateway is in force within applyBound on a raw device streaming to the
// other (its trend reads the new curve, from the open stream, without a
// reconnection); a per-device profile set through one gateway for a device
// neither has seen is in force from that device's first connection to the
// other, and so are operator labels set with `pulsefleet labels`; etcd
// stopped: the device streams on under its curve and calibration and label
// changes are refused naming etcd; etcd back: a new version
// put and assigned through the other gateway is in force too, and the
// audit names the gateway that took each change.
func TestFleetOnEtcdSharedCalibrations(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 2)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	runSim := func(prefix string) chan struct{} {
		done := make(chan struct{})
		go func() {
			defer close(done)
			if _, err := sim.Run(ctx, sim.Options{Gateway: f.addrs[0], Fallbacks: f.addrs[1:], Devices: 1, IDPrefix: prefix, Mode: sim.ModeRaw,
				RateHz: 50, Seed: 7, Drain: -1}); err != nil && ctx.Err() == nil {
				t.Errorf("sim %s: %v", prefix, err)
			}
		}()
		return done
	}
	simDone := runSim("cal")
	f.waitAllConnected(t, 1, 30*time.Second)
	holder := 0
	if f.connected(1)["cal-0001"] {
		holder = 1
	}
	other := 1 - holder
	flH := fleetClient(t, f.addrs[holder])
	adO, adH := adminClient(t, f.addrs[other]), adminClient(t, f.addrs[holder])
	waitCurve(t, flH, "cal-0001", "empirical", 110, time.Now(), 60*time.Second) // the textbook line before any assignment

	if _, err := adO.PutCalibration(context.Background(), &pb.PutCalibrationRequest{CurveYaml: linearCurve("fleet-shift", 80)}); err != nil {
		t.Fatalf("put a calibration through gateway %d: %v", other, err)
	}
	asked := time.Now()
	if _, err := adO.AssignCalibration(context.Background(), &pb.AssignCalibrationRequest{Model: "sim-proto", Calibration: "fleet-shift"}); err != nil {
		t.Fatalf("assign it through gateway %d: %v", other, err)
	}
	named, value := waitCurve(t, flH, "cal-0001", "fleet-shift@v1", 80, asked, applyBound+5*time.Second)
	t.Logf("calibration put and assigned through gateway %d: named on the stream at gateway %d after %v, first value on the new curve after %v",
		other, holder, named.Round(time.Millisecond), value.Round(time.Millisecond))
	if named > applyBound {
		t.Errorf("calibration in force on gateway %d after %v, want within %v", holder, named, applyBound)
	}

	// Operator labels set through the other gateway (the CLI) are on the
	// device's description at the holder within applyBound, beside the
	// introduction's.
	asked = time.Now()
	if code, out, errOut := runCmd("labels", "--gateway", f.addrs[other], "--device", "cal-0001", "--label", "bed=4", "--label", "ward=east", "--reason", "moved"); code != 0 {
		t.Fatalf("labels through gateway %d: exit %d: %s %s", other, code, out, errOut)
	}
	for {
		r, err := flH.GetDevice(context.Background(), &pb.GetDeviceRequest{DeviceId: "cal-0001"})
		if l := r.GetDevice().GetLabels(); err == nil && l["bed"] == "4" && l["ward"] == "east" {
			t.Logf("labels set through gateway %d on the device at gateway %d after %v", other, holder, time.Since(asked).Round(time.Millisecond))
			break
		}
		if time.Since(asked) > applyBound {
			t.Fatalf("labels of cal-0001 at gateway %d %v after they were set: %v (%v), want bed=4 ward=east", holder, applyBound, r.GetDevice().GetLabels(), err)
		}
		time.Sleep(10 * time.Millisecond)
	}

	// A per-device profile for a device no gateway has seen, set through
	// the gateway that will not own it.
	prefix := "ahead" // sim names its device PREFIX-0001: take a prefix the holder owns
	for i := 0; shard.Owner(prefix+"-0001", f.addrs) != f.addrs[holder]; i++ {
		prefix = fmt.Sprintf("ahead%d", i)
	}
	ahead := prefix + "-0001"
	if _, err := fleetClient(t, f.addrs[other]).SetAlarmProfile(context.Background(), &pb.SetAlarmProfileRequest{DeviceId: ahead, ProfileYaml: "home-overnight", Reason: "before its first connection"}); err != nil {
		t.Fatalf("per-device profile for a device not seen yet, through gateway %d: %v", other, err)
	}
	time.Sleep(applyBound) // the change reaches the holder before the device does
	aheadDone := runSim(prefix)
	for start := time.Now(); ; time.Sleep(20 * time.Millisecond) {
		if f.connected(holder)[ahead] {
			break
		}
		if time.Since(start) > 30*time.Second {
			t.Fatalf("device %s not streaming to gateway %d within 30 s", ahead, holder)
		}
	}
	if r, err := flH.GetAlarmProfile(context.Background(), &pb.GetAlarmProfileRequest{DeviceId: ahead}); err != nil || r.GetName() != "home-overnight" || r.GetOrigin() != "device" {
		t.Fatalf("profile of %s at its first connection to gateway %d: %q from %q (%v), want home-overnight from device", ahead, holder, r.GetName(), r.GetOrigin(), err)
	}

	f.etcd.Stop()
	outage := time.Now()
	for {
		code, body := readyz(f.kids[holder].httpAddr)
		if code == http.StatusOK && strings.Contains(body, "degraded") {
			break
		}
		if time.Since(outage) > 10*time.Second {
			t.Fatalf("gateway %d: /readyz %d %q, want 200 and degraded within 10 s of etcd stopping", holder, code, body)
		}
		time.Sleep(100 * time.Millisecond)
	}
	for i, ad := range []pb.AdminServiceClient{adH, adO} {
		_, err := ad.PutCalibration(context.Background(), &pb.PutCalibrationRequest{CurveYaml: linearCurve("fleet-shift", 90)})
		if status.Code(err) != codes.Unavailable || !strings.Contains(err.Error(), "control plane (etcd) is unreachable") {
			t.Fatalf("put a calibration while etcd is down (client %d): %v, want UNAVAILABLE naming the unreachable control plane (etcd)", i, err)
		}
		_, err = ad.AssignCalibration(context.Background(), &pb.AssignCalibrationRequest{DeviceId: "cal-0001", Calibration: "empirical"})
		if status.Code(err) != codes.Unavailable || !strings.Contains(err.Error(), "control plane (etcd) is unreachable") {
			t.Fatalf("assign a calibration while etcd is down (client %d): %v, want UNAVAILABLE naming the unreachable control plane (etcd)", i, err)
		}
		_, err = ad.SetDeviceLabels(context.Background(), &pb.SetDeviceLabelsRequest{DeviceId: "cal-0001", Labels: map[string]string{"bed": "5"}})
		if status.Code(err) != codes.Unavailable || !strings.Contains(err.Error(), "control plane (etcd) is unreachable") {
			t.Fatalf("set labels while etcd is down (client %d): %v, want UNAVAILABLE naming the unreachable control plane (etcd)", i, err)
		}
	}
	// Ingest goes on under the last known curve.
	waitCurve(t, flH, "cal-0001", "fleet-shift@v1", 80, time.Now(), 10*time.Second)
	f.etcd.Start()
	back := time.Now()
	for {
		if code, body := readyz(f.kids[holder].httpAddr); code == http.StatusOK && strings.TrimSpace(body) == "ready" {
			break
		}
		if time.Since(back) > 15*time.Second {
			t.Fatalf("gateway %d: /readyz not back to ready within 15 s of etcd returning", holder)
		}
		time.Sleep(100 * time.Millisecond)
	}
	for {
		if code, body := readyz(f.kids[other].httpAddr); code == http.StatusOK && strings.TrimSpace(body) == "ready" {
			break
		}
		if time.Since(back) > 15*time.Second {
			t.Fatalf("gateway %d: /readyz not back to ready within 15 s of etcd returning", other)
		}
		time.Sleep(100 * time.Millisecond)
	}
	put, err := adO.PutCalibration(context.Background(), &pb.PutCalibrationRequest{CurveYaml: linearCurve("fleet-shift", 90)})
	if err != nil || put.GetCalibration().GetVersion() != 2 {
		t.Fatalf("put version 2 through gateway %d after etcd is back: %v %v", other, put, err)
	}
	asked = time.Now()
	if _, err := adO.AssignCalibration(context.Background(), &pb.AssignCalibrationRequest{DeviceId: "cal-0001", Calibration: "fleet-shift@v2"}); err != nil {
		t.Fatal(err)
	}
	named, value = waitCurve(t, flH, "cal-0001", "fleet-shift@v2", 90, asked, applyBound+5*time.Second)
	t.Logf("after etcd's return, version 2 assigned to the device through gateway %d: named on gateway %d after %v, value after %v",
		other, holder, named.Round(time.Millisecond), value.Round(time.Millisecond))
	if named > applyBound {
		t.Errorf("calibration in force on gateway %d after %v, want within %v", holder, named, applyBound)
	}
	cancel()
	<-simDone
	<-aheadDone

	au, err := adH.ListAudit(context.Background(), &pb.ListAuditRequest{})
	if err != nil {
		t.Fatal(err)
	}
	var synced []string
	for _, e := range au.GetEntries() {
		if (strings.HasPrefix(e.GetAction(), "calibration.sync") || e.GetAction() == "device.labels.sync") && strings.Contains(e.GetDetail(), "taken by gateway "+f.addrs[other]) {
			synced = append(synced, e.GetDetail())
		}
	}
	if len(synced) != 5 { // two versions, two assignments, one label change
		t.Errorf("gateway %d's audit: calibration and label changes naming gateway %s: %q, want 5", holder, f.addrs[other], synced)
	}
	if r, err := flH.GetDevice(context.Background(), &pb.GetDeviceRequest{DeviceId: "cal-0001"}); err != nil || r.GetDevice().GetLabels()["bed"] != "4" {
		t.Errorf("labels after the outage: %v (%v), want bed=4 kept (the change during it was refused)", r.GetDevice().GetLabels(), err)
	}
}
