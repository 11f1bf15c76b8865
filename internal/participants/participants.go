// Package participants holds the pure rules of study enrolment: what a
// participant id may look like, when two enrolment intervals collide, how a
// participant's history is stitched from the devices enrolled to them, and
// which local-time window is a participant-night. It imports nothing of
// pulsefleet, so the store (which keeps enrolments), the gateway and the
// commands apply the same rules.
//
// A participant id is a pseudonymous study code chosen by the study team
// (for example P-0042 or SITE1_017). It must never be a name, initials with
// a birth date, a hospital number or anything else that identifies a person
// outside the study's own key list. CheckID enforces a safe shape (upper
// case, digits, - and _, at least one digit, 2..32 characters), which keeps
// plain names out, but no rule can tell a code from a name written as one:
// choosing codes is the study team's duty.
package participants

import (
	"fmt"
	"sort"
	"time"
)

// MaxIDLen bounds a participant id.
const MaxIDLen = 32

// CheckID returns an error naming field and the bound when pid is not a
// participant id: 2..MaxIDLen characters of A-Z 0-9 - _, with at least one
// digit (so a plain name such as "MARIA" or "smith" is refused).
func CheckID(field, pid string) error {
	if n := len(pid); n < 2 || n > MaxIDLen {
		return fmt.Errorf("%s: length %d, want 2..%d (a pseudonymous study code such as P-0042, never a name)", field, n, MaxIDLen)
	}
	digit := false
	for i := 0; i < len(pid); i++ {
		c := pid[i]
		switch {
		case c >= '0' && c <= '9':
			digit = true
		case c >= 'A' && c <= 'Z', c == '-', c == '_':
		default:
			return fmt.Errorf("%s: %q has character %q, want only A-Z 0-9 - _ (a pseudonymous study code such as P-0042, never a name)", field, pid, c)
		}
	}
	if !digit {
		return fmt.Errorf("%s: %q has no digit; a participant id is a pseudonymous study code such as P-0042, never a name", field, pid)
	}
	return nil
}

// Open is the end of an open-ended interval: the enrolment still runs.
const Open int64 = 0

// Interval is one enrolment: device's data from FromMS (inclusive) to ToMS
// (exclusive; Open = not ended) belong to Participant. Times are Unix
// milliseconds on the device clock, as trend points are stored.
type Interval struct {
	Participant string
	Device      string
	FromMS      int64
	ToMS        int64
}

// End is ToMS with Open read as the end of time.
func (iv Interval) End() int64 {
	if iv.ToMS == Open {
		return 1<<63 - 1
	}
	return iv.ToMS
}

// Contains reports whether time t falls in the interval.
func (iv Interval) Contains(t int64) bool { return t >= iv.FromMS && t < iv.End() }

// Overlaps reports whether two intervals share at least one millisecond.
func (iv Interval) Overlaps(o Interval) bool { return iv.FromMS < o.End() && o.FromMS < iv.End() }

// String shows the interval in RFC 3339 UTC, "open" for an open end.
func (iv Interval) String() string {
	to := "open"
	if iv.ToMS != Open {
		to = fmtMS(iv.ToMS)
	}
	return fmt.Sprintf("%s..%s", fmtMS(iv.FromMS), to)
}

func fmtMS(ms int64) string { return time.UnixMilli(ms).UTC().Format(time.RFC3339) }

// Check validates one interval on its own: ids and a positive length.
func (iv Interval) Check() error {
	if err := CheckID("participant", iv.Participant); err != nil {
		return err
	}
	if iv.Device == "" {
		return fmt.Errorf("device: required")
	}
	if iv.FromMS <= 0 {
		return fmt.Errorf("from: %d ms, want a time after 1970", iv.FromMS)
	}
	if iv.ToMS != Open && iv.ToMS <= iv.FromMS {
		return fmt.Errorf("to: %s is not after from %s", fmtMS(iv.ToMS), fmtMS(iv.FromMS))
	}
	return nil
}

// Conflict returns an error naming both intervals when iv would give a
// device to two participants (or twice to one) at the same time: a device
// belongs to at most one participant at any time. A participant may hold
// several devices at once; that is no conflict.
func Conflict(existing []Interval, iv Interval) error {
	for _, e := range existing {
		if e.Device == iv.Device && e.Overlaps(iv) {
			return fmt.Errorf("device %s is already enrolled to %s for %s; the requested enrolment to %s for %s overlaps it "+
				"(end or shorten the first, or choose another interval)", iv.Device, e.Participant, e, iv.Participant, iv)
		}
	}
	return nil
}

// Segment is one stretch of a participant's history: Device's data from
// FromMS to ToMS (exclusive, always finite).
type Segment struct {
	Device string
	FromMS int64
	ToMS   int64
}

// Stitch returns pid's history within [fromMS, toMS) as segments, one per
// enrolment of pid clipped to the window, ordered by start then device.
// Two devices held at once (a prototype and a reference oximeter) give two
// overlapping segments; nothing merges their points.
func Stitch(all []Interval, pid string, fromMS, toMS int64) []Segment {
	var out []Segment
	for _, iv := range all {
		if iv.Participant != pid {
			continue
		}
		s := Segment{Device: iv.Device, FromMS: max(iv.FromMS, fromMS), ToMS: min(iv.End(), toMS)}
		if s.ToMS > s.FromMS {
			out = append(out, s)
		}
	}
	sort.Slice(out, func(i, j int) bool {
		if out[i].FromMS != out[j].FromMS {
			return out[i].FromMS < out[j].FromMS
		}
		return out[i].Device < out[j].Device
	})
	return out
}

// Holder returns the participant enrolled to device at time t, or "".
func Holder(all []Interval, device string, t int64) string {
	for _, iv := range all {
		if iv.Device == device && iv.Contains(t) {
			return iv.Participant
		}
	}
	return ""
}
