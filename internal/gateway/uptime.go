package gateway

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
	from := nowMS - window.Milliseconds()
	if firstSeenMS > from {
		from = firstSeenMS
	}
	den := nowMS - from
	if den <= 0 {
		return 0, false
	}
	var up int64
	for _, s := range on {
		if start, end := max(s.StartMS, from), min(s.EndMS, nowMS); end > start {
			up += end - start
		}
	}
	return math.Max(0, math.Min(1, float64(up)/float64(den))), true
}
