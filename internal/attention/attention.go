package attention

import (
	"sort"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// DefaultStale is the age beyond which a value is not shown as current
// (team choice: ten one-second points missed).
const DefaultStale = 10 * time.Second

// Groups of Group, in order.
const (
	GroupAlarm     = 0
	GroupTechnical = 1
	GroupNoValue   = 2
	GroupRest      = 3
)

// Stale reports whether the device's latest value must not be shown as
// current at now: the device is offline, has no value, or the value (its
// device-clock time) is older than stale.
func Stale(d *pb.Device, now time.Time, stale time.Duration) bool {
	l := d.GetLatest()
	return !d.GetConnected() || l == nil || l.GetTimeUnixMs() <= 0 || now.Sub(time.UnixMilli(l.GetTimeUnixMs())) > stale
}

// Group ranks what a device needs (see the package comment).
func Group(d *pb.Device, now time.Time, stale time.Duration) int {
	switch {
	case d.GetAlarmPriority() != pb.Priority_PRIORITY_UNSPECIFIED || len(d.GetActiveConditions()) > 0:
		return GroupAlarm
	case Stale(d, now, stale):
		return GroupNoValue
	case d.GetLatest().GetFlags() != 0 || d.GetLatest().Spo2Pct == nil:
		return GroupTechnical
	}
	return GroupRest
}

// Order sorts devices by attention. announced maps a device id to when its
// earliest open alarm episode was announced (Unix ms; absent = unknown).
func Order(devs []*pb.Device, announced map[string]int64, now time.Time, stale time.Duration) {
	sort.SliceStable(devs, func(i, j int) bool {
		a, b := devs[i], devs[j]
		ga, gb := Group(a, now, stale), Group(b, now, stale)
		if ga != gb {
			return ga < gb
		}
		if ga == GroupAlarm {
			if a.GetAlarmPriority() != b.GetAlarmPriority() {
				return a.GetAlarmPriority() > b.GetAlarmPriority()
			}
			ta, tb := announced[a.GetDeviceId()], announced[b.GetDeviceId()]
			if ta != tb && ta > 0 && tb > 0 {
				return ta < tb
			}
			if (ta > 0) != (tb > 0) {
				return ta > 0
			}
		}
		return a.GetDeviceId() < b.GetDeviceId()
	})
}

// Announced returns, per device, when its earliest open alarm episode was
// announced (Unix ms), from a list of active episodes.
func Announced(eps []*pb.Episode, into map[string]int64) map[string]int64 {
	if into == nil {
		into = map[string]int64{}
	}
	for _, e := range eps {
		if t := e.GetAnnouncedUnixMs(); t > 0 && (into[e.GetDeviceId()] == 0 || t < into[e.GetDeviceId()]) {
			into[e.GetDeviceId()] = t
		}
	}
	return into
}
