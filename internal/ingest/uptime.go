package ingest

import (
	"math"
	"time"
)

// span is a stretch of gateway time [StartMS, EndMS) in which a device had
// a stream open.
type span struct{ StartMS, EndMS int64 }

// uptimeShare is the one computation of a device's uptime over a window
// ending at nowMS, for the API (GetDeviceQuality, ListDeviceQuality) and so
// for `pulsefleet quality` and the web page, which show what the API says.
// The denominator is the part of the window since the device was first
// seen (firstSeenMS; 0 = unknown, the whole window): a device connected for
// the whole 40 s it has existed is up 100 %, not 1 % of an hour. covered is
// false while that part is empty (the device was first seen at nowMS or
// later); the share is then 0 and means nothing.
func uptimeShare(on []span, firstSeenMS, nowMS int64, window time.Duration) (share float64, covered bool) {
	den := uptimeWindowMS(firstSeenMS, nowMS, window)
	if den <= 0 {
		return 0, false
	}
	from := nowMS - den
	var up int64
	for _, s := range on {
		if start, end := max(s.StartMS, from), min(s.EndMS, nowMS); end > start {
			up += end - start
		}
	}
	return math.Max(0, math.Min(1, float64(up)/float64(den))), true
}

// uptimeWindowMS is the denominator of uptimeShare: the part of the window
// ending at nowMS since the device was first seen, in milliseconds (0 or
// less = none yet). The API reports it (DeviceQuality.uptime_*_window_s) so
// that a view can show "-" rather than a share that means nothing.
func uptimeWindowMS(firstSeenMS, nowMS int64, window time.Duration) int64 {
	from := nowMS - window.Milliseconds()
	if firstSeenMS > from {
		from = firstSeenMS
	}
	return nowMS - from
}
