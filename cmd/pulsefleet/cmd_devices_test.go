package main

import (
	"bytes"
	"strings"
	"testing"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func f64(v float64) *float64 { return &v }

// The default order puts what needs attention first (issue 15): alarms by
// priority, high to low, the longest announced first within a priority;
// then technical problems (offline, stale values); then the rest by id.
func TestDevicesOrderByAttention(t *testing.T) {
	now := time.UnixMilli(1_800_000_000_000)
	fresh := &pb.TrendPoint{TimeUnixMs: now.UnixMilli() - 1000, Spo2Pct: f64(97)}
	old := &pb.TrendPoint{TimeUnixMs: now.UnixMilli() - 60_000, Spo2Pct: f64(98)}
	dev := func(id string, pr pb.Priority, conn bool, l *pb.TrendPoint, conds ...string) *pb.Device {
		return &pb.Device{DeviceId: id, AlarmPriority: pr, Connected: conn, Latest: l, ActiveConditions: conds}
	}
	devs := []*pb.Device{
		dev("a-fine", 0, true, fresh),
		dev("b-offline", 0, false, old),
		dev("c-low", pb.Priority_PRIORITY_LOW, true, fresh, "pulse_high"),
		dev("d-high-new", pb.Priority_PRIORITY_HIGH, true, fresh, "spo2_low"),
		dev("e-medium", pb.Priority_PRIORITY_MEDIUM, true, fresh, "signal_lost"),
		dev("f-high-old", pb.Priority_PRIORITY_HIGH, true, fresh, "spo2_low"),
		dev("g-stale", 0, true, old),
		dev("h-fine", 0, true, fresh),
	}
	announced := map[string]int64{"d-high-new": now.UnixMilli() - 5_000, "f-high-old": now.UnixMilli() - 90_000,
		"c-low": now.UnixMilli() - 1_000, "e-medium": now.UnixMilli() - 2_000}
	orderByAttention(devs, announced, now, 10*time.Second)
	var got []string
	for _, d := range devs {
		got = append(got, d.GetDeviceId())
	}
	want := "f-high-old d-high-new e-medium c-low b-offline g-stale a-fine h-fine"
	if strings.Join(got, " ") != want {
		t.Errorf("order %v, want %s", got, want)
	}
}

// A value older than --stale is never printed as current: "-" and its age;
// conditions are shown by their readable labels.
func TestDevicesTableStaleAndLabels(t *testing.T) {
	now := time.UnixMilli(1_800_000_000_000)
	devs := []*pb.Device{
		{DeviceId: "old-1", Connected: true, Latest: &pb.TrendPoint{TimeUnixMs: now.UnixMilli() - 14_000, Spo2Pct: f64(98.2)}, LastSeenUnixMs: now.UnixMilli() - 14_000},
		{DeviceId: "new-1", Connected: true, Latest: &pb.TrendPoint{TimeUnixMs: now.UnixMilli() - 2_000, Spo2Pct: f64(87.4)},
			AlarmPriority: pb.Priority_PRIORITY_HIGH, ActiveConditions: []string{"spo2_low", "device_clock_fault", "my_rule"}},
	}
	var b bytes.Buffer
	if err := writeDevicesTable(&b, devs, map[string]string{"new-1": "P-0042"}, now, 10*time.Second); err != nil {
		t.Fatal(err)
	}
	out := b.String()
	if strings.Contains(out, "98.2") || !strings.Contains(out, "stale, 14s old") {
		t.Errorf("stale value shown as current or without its age:\n%s", out)
	}
	if !strings.Contains(out, "new-1   P-0042  ") || !strings.Contains(out, "old-1   -  ") {
		t.Errorf("participant column:\n%s", out)
	}
	if !strings.Contains(out, "87.4") || !strings.Contains(out, "SpO2 low, device clock fault, my_rule") {
		t.Errorf("fresh value or readable labels missing:\n%s", out)
	}
	// A longer --stale shows the same value as current.
	b.Reset()
	if err := writeDevicesTable(&b, devs[:1], nil, now, time.Minute); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "98.2") {
		t.Errorf("--stale 1m: value hidden:\n%s", b.String())
	}
	// An offline device's value is never current, however young
	// (attention.Stale, the web page's rule too).
	b.Reset()
	off := []*pb.Device{{DeviceId: "gone-1", Latest: &pb.TrendPoint{TimeUnixMs: now.UnixMilli() - 2_000, Spo2Pct: f64(96.1)}}}
	if err := writeDevicesTable(&b, off, nil, now, time.Minute); err != nil {
		t.Fatal(err)
	}
	if strings.Contains(b.String(), "96.1") || !strings.Contains(b.String(), "stale, 2s old") {
		t.Errorf("offline device's value shown as current:\n%s", b.String())
	}
}

// Against a real gateway: the command asks for open episodes and lists the
// devices; their summaries are a minute old (startQualityGateway), so no
// value is printed as current.
func TestDevicesCommandRealGateway(t *testing.T) {
	addr := startQualityGateway(t, []string{"ward-2", "ward-1"}, 3, nil)
	code, out, stderr := runCmd("devices", "--gateway", addr)
	if code != 0 || !strings.Contains(out, "ward-1") || !strings.Contains(out, "ward-2") {
		t.Fatalf("exit %d, stderr %q, out:\n%s", code, stderr, out)
	}
	if strings.Contains(out, "96.0") || !strings.Contains(out, "stale, ") {
		t.Errorf("a minute-old value shown as current:\n%s", out)
	}
	if code, _, stderr := runCmd("devices", "--gateway", addr, "--order", "size"); code != 2 || !strings.Contains(stderr, "want attention or id") {
		t.Errorf("--order size: exit %d, %q", code, stderr)
	}
}
