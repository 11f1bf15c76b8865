package attention

import (
	"strings"
	"testing"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

func f64(v float64) *float64 { return &v }

// The order of issue 15: alarms by priority (longest announced first), then
// technical problems of a current value, then devices without a current
// value, then the rest; ties by id.
func TestOrder(t *testing.T) {
	now := time.UnixMilli(1_800_000_000_000)
	ms := now.UnixMilli()
	fresh := &pb.TrendPoint{TimeUnixMs: ms - 1000, Spo2Pct: f64(97)}
	flagged := &pb.TrendPoint{TimeUnixMs: ms - 1000, Flags: 2} // sensor off, no SpO2
	old := &pb.TrendPoint{TimeUnixMs: ms - 60_000, Spo2Pct: f64(98)}
	dev := func(id string, pr pb.Priority, conn bool, l *pb.TrendPoint, conds ...string) *pb.Device {
		return &pb.Device{DeviceId: id, AlarmPriority: pr, Connected: conn, Latest: l, ActiveConditions: conds}
	}
	devs := []*pb.Device{
		dev("a-fine", 0, true, fresh),
		dev("b-offline-recent", 0, false, fresh), // offline: not current however young its value
		dev("c-low", pb.Priority_PRIORITY_LOW, true, fresh, "pulse_high"),
		dev("d-high-new", pb.Priority_PRIORITY_HIGH, true, fresh, "spo2_low"),
		dev("e-medium", pb.Priority_PRIORITY_MEDIUM, true, fresh, "signal_lost"),
		dev("f-high-old", pb.Priority_PRIORITY_HIGH, true, fresh, "spo2_low"),
		dev("g-stale", 0, true, old),
		dev("h-sensor-off", 0, true, flagged),
		dev("i-never", 0, true, nil),
		dev("j-fine", 0, true, fresh),
	}
	eps := []*pb.Episode{
		{DeviceId: "d-high-new", AnnouncedUnixMs: ms - 5_000}, {DeviceId: "f-high-old", AnnouncedUnixMs: ms - 90_000},
		{DeviceId: "f-high-old", AnnouncedUnixMs: ms - 10_000}, {DeviceId: "c-low", AnnouncedUnixMs: ms - 1_000},
	}
	Order(devs, Announced(eps, nil), now, DefaultStale)
	var got []string
	for _, d := range devs {
		got = append(got, d.GetDeviceId())
	}
	want := "f-high-old d-high-new e-medium c-low h-sensor-off b-offline-recent g-stale i-never a-fine j-fine"
	if strings.Join(got, " ") != want {
		t.Errorf("order\n %v\nwant\n %s", strings.Join(got, " "), want)
	}
}

// Stale: the bound itself is still current (older than, not as old as).
func TestStaleBound(t *testing.T) {
	now := time.UnixMilli(1_800_000_000_000)
	d := &pb.Device{Connected: true, Latest: &pb.TrendPoint{TimeUnixMs: now.UnixMilli() - 10_000, Spo2Pct: f64(95)}}
	if Stale(d, now, 10*time.Second) {
		t.Error("a value exactly 10 s old is stale, want current")
	}
	if !Stale(d, now.Add(time.Millisecond), 10*time.Second) {
		t.Error("a value 10.001 s old is current, want stale")
	}
}
