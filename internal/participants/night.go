package participants

import (
	"fmt"
	"strconv"
	"strings"
	"time"
)

// NightWindow is the local-time window counted as a participant-night, for
// example 22:00-07:00 in Europe/Berlin. A window whose end is not after its
// start runs past midnight; a night is named by the local date it starts on.
// The default (DefaultNight) is a team choice, not a clinical definition: a
// study sets its own window with --night and --tz.
type NightWindow struct {
	StartMin, EndMin int // minutes after local midnight, 0..1439
	Loc              *time.Location
}

// DefaultNight is the window used when none is given: 22:00-07:00 (team
// choice: covers a usual ward or home sleep period).
const DefaultNight = "22:00-07:00"

// ParseNight reads "HH:MM-HH:MM" in location loc (nil = UTC).
func ParseNight(s string, loc *time.Location) (NightWindow, error) {
	if loc == nil {
		loc = time.UTC
	}
	a, b, ok := strings.Cut(s, "-")
	if !ok {
		return NightWindow{}, fmt.Errorf("night: %q, want HH:MM-HH:MM such as %s", s, DefaultNight)
	}
	start, err := clockMin(a)
	if err != nil {
		return NightWindow{}, fmt.Errorf("night: start %w", err)
	}
	end, err := clockMin(b)
	if err != nil {
		return NightWindow{}, fmt.Errorf("night: end %w", err)
	}
	if start == end {
		return NightWindow{}, fmt.Errorf("night: %q starts and ends at the same time; want a window such as %s", s, DefaultNight)
	}
	return NightWindow{StartMin: start, EndMin: end, Loc: loc}, nil
}

func clockMin(s string) (int, error) {
	h, m, ok := strings.Cut(strings.TrimSpace(s), ":")
	hh, err1 := strconv.Atoi(h)
	mm, err2 := strconv.Atoi(m)
	if !ok || err1 != nil || err2 != nil || hh < 0 || hh > 23 || mm < 0 || mm > 59 {
		return 0, fmt.Errorf("%q: want HH:MM, 00:00..23:59", s)
	}
	return hh*60 + mm, nil
}

// String is the window as ParseNight reads it, with its zone.
func (w NightWindow) String() string {
	return fmt.Sprintf("%02d:%02d-%02d:%02d %s", w.StartMin/60, w.StartMin%60, w.EndMin/60, w.EndMin%60, w.Loc)
}

// Night is one night: its name (the local date it starts on) and its span.
type Night struct {
	Date   string // YYYY-MM-DD, local
	FromMS int64
	ToMS   int64
}

// Nights returns the nights that overlap [fromMS, toMS), oldest first, each
// with its whole span (not clipped). Local clock times that a daylight-
// saving change skips or repeats are resolved as package time does.
func (w NightWindow) Nights(fromMS, toMS int64) []Night {
	var out []Night
	t := time.UnixMilli(fromMS).In(w.Loc)
	// Start one day early: a night that began yesterday may cover fromMS.
	d := time.Date(t.Year(), t.Month(), t.Day()-1, 0, 0, 0, 0, w.Loc)
	for ; ; d = d.AddDate(0, 0, 1) {
		start := time.Date(d.Year(), d.Month(), d.Day(), w.StartMin/60, w.StartMin%60, 0, 0, w.Loc)
		endDay := d
		if w.EndMin <= w.StartMin {
			endDay = d.AddDate(0, 0, 1)
		}
		end := time.Date(endDay.Year(), endDay.Month(), endDay.Day(), w.EndMin/60, w.EndMin%60, 0, 0, w.Loc)
		if start.UnixMilli() >= toMS {
			return out
		}
		if end.UnixMilli() > fromMS {
			out = append(out, Night{Date: d.Format("2006-01-02"), FromMS: start.UnixMilli(), ToMS: end.UnixMilli()})
		}
	}
}

// NightSegment is the part of one segment (one device of a participant)
// inside one night.
type NightSegment struct {
	Night Night
	Segment
}

// SplitNights cuts segments into their parts inside nights, ordered by
// night, then start, then device. Parts outside every night are dropped.
func (w NightWindow) SplitNights(segs []Segment) []NightSegment {
	var out []NightSegment
	if len(segs) == 0 {
		return nil
	}
	lo, hi := segs[0].FromMS, segs[0].ToMS
	for _, s := range segs {
		lo, hi = min(lo, s.FromMS), max(hi, s.ToMS)
	}
	for _, n := range w.Nights(lo, hi) {
		for _, s := range segs {
			a, b := max(s.FromMS, n.FromMS), min(s.ToMS, n.ToMS)
			if b > a {
				out = append(out, NightSegment{Night: n, Segment: Segment{Device: s.Device, FromMS: a, ToMS: b}})
			}
		}
	}
	return out
}
