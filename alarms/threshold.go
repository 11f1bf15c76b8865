package alarms

import (
	"math"
	"sort"
)

// Threshold is the presence test of a condition that depends only on one
// value of each sample against its limit and its clearing level (limit ±
// hysteresis): every kind but desaturation, whose baseline moves. Two
// conditions with equal Thresholds are present over the same intervals of
// any trend, whatever their delays, escalations and latching, so a tuning
// sweep finds the intervals once and derives every such condition's
// episodes from them (ThresholdRule.Episode). Comparable: use it as a key.
type Threshold struct {
	slot         uint8
	sign         float64
	limit, clear float64 // signed, as the engine compares them
}

// Presence is one interval during which a threshold condition is present
// over a trend: from its onset at sample On to the sample Off that clears
// it, or Off = len(samples) when it is still present after the last.
type Presence struct{ On, Off int }

// value is the engine's signed value of s for th (NaN when missing).
func (th Threshold) value(s *Sample) float64 {
	var v float64
	switch th.slot {
	case slotSpO2:
		v = math.NaN()
		if s.SpO2 > 0 && s.SpO2 <= 100 {
			v = s.SpO2
		}
	case slotPulse:
		v = math.NaN()
		if s.Pulse > 0 && s.Pulse <= 350 {
			v = s.Pulse
		}
	case slotPI:
		v = math.NaN()
		if s.PI >= 0 && s.PI <= 100 {
			v = s.PI
		}
	case slotSQI:
		v = math.NaN()
		if s.SQI >= 0 && s.SQI <= 1 {
			v = s.SQI
		}
	case slotPresent:
		if s.SpO2 > 0 && s.SpO2 <= 100 {
			v = 1
		}
	default:
		v = math.NaN()
	}
	return th.sign * v
}

// Presences appends to dst the intervals during which th is present over
// samples, as a fresh engine evaluating them finds them: present from the
// first sample beyond the limit, cleared at the first sample at or past
// the clearing level, missing values changing neither. ok is false (and
// nothing is appended) when sample times do not strictly increase: the
// engine skips such samples, and the caller should run it instead.
func (th Threshold) Presences(samples []Sample, dst []Presence) (_ []Presence, ok bool) {
	n0 := len(dst)
	on := -1
	prev := math.Inf(-1)
	for i := range samples {
		s := &samples[i]
		if !(s.T > prev) {
			return dst[:n0], false
		}
		prev = s.T
		x := th.value(s)
		if on < 0 {
			if x < th.limit {
				on = i
			}
		} else if x >= th.clear {
			dst = append(dst, Presence{on, i})
			on = -1
		}
	}
	if on >= 0 {
		dst = append(dst, Presence{on, len(samples)})
	}
	return dst, true
}

// ThresholdRule is a threshold condition compiled for deriving episodes
// from presence intervals.
type ThresholdRule struct {
	Threshold
	delay, escAfter, esc float64 // s, s (+Inf none), signed depth (-Inf none)
	prio, escPrio        Priority
}

// NewThresholdRule compiles c (valid) the way the engine does; ok is false
// for a condition that is not a plain threshold (desaturation) or does not
// validate.
func NewThresholdRule(c Condition) (ThresholdRule, bool) {
	if c.Kind == Desaturation {
		return ThresholdRule{}, false
	}
	e, err := NewEngine(&Profile{Name: "threshold", Conditions: []Condition{c}}, "")
	if err != nil {
		return ThresholdRule{}, false
	}
	k := &e.conds[0]
	return ThresholdRule{Threshold: Threshold{slot: k.slot, sign: k.sign, limit: k.limit, clear: k.clear},
		delay: k.delay, escAfter: k.escAfter, esc: k.esc, prio: k.prio, escPrio: k.escPrio}, true
}

// ThresholdEpisode is an announced episode derived from a presence
// interval: times in seconds (Escalated NaN when not escalated, Ended NaN
// when still active after the last sample) and the priority it ended with.
type ThresholdEpisode struct {
	Onset, Announced, Escalated, Ended float64
	Priority                           Priority
}

// Episode derives the episode of r within presence p of its Threshold
// over samples, exactly as the engine times it: announced at the first
// sample of the interval at least the delay after the onset, escalated at
// the first sample from then on beyond the escalation depth or the
// escalation time after the onset. ok is false when the interval ends (or
// the data end) before the delay: the episode was withdrawn or is still
// pending, and is never announced.
func (r *ThresholdRule) Episode(samples []Sample, p Presence) (ThresholdEpisode, bool) {
	t0 := samples[p.On].T
	span := samples[p.On:p.Off]
	delay := r.delay - eps
	a := sort.Search(len(span), func(i int) bool { return !(span[i].T-t0 < delay) })
	if a == len(span) {
		return ThresholdEpisode{}, false
	}
	ep := ThresholdEpisode{Onset: t0, Announced: span[a].T, Escalated: math.NaN(), Ended: math.NaN(), Priority: r.prio}
	if p.Off < len(samples) {
		ep.Ended = samples[p.Off].T
	}
	if r.escPrio != PriorityNone {
		escAfter := r.escAfter - eps
		// First sample escalated by duration (times increase, so it is a
		// search), then the first before it escalated by depth.
		e := a + sort.Search(len(span)-a, func(i int) bool { return span[a+i].T-t0 >= escAfter })
		if !math.IsInf(r.esc, -1) {
			for i := a; i < e; i++ {
				if r.value(&span[i]) < r.esc {
					e = i
					break
				}
			}
		}
		if e < len(span) {
			ep.Escalated = span[e].T
			ep.Priority = r.escPrio
		}
	}
	return ep, true
}
