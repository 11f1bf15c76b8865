package alarms

// What an operator does to a stream's alarms: acknowledge announced
// episodes, pause and resume alarm signals, and switch the stream's profile.

import (
	"errors"
	"fmt"
	"math"
)

// Acknowledge records an operator's acknowledgement at t of every announced
// episode not yet acknowledged at its current priority, and stops the signal
// of latched episodes (which then finish). It returns how many episodes it
// acknowledged. An episode that escalates after an acknowledgement is
// announced again at its new priority and may be acknowledged again.
func (e *Engine) Acknowledge(who string, t float64, emit func(Event)) int {
	n := 0
	for i := range e.st {
		c, st := &e.conds[i], &e.st[i]
		if st.latched {
			st.latched = false
			st.latch.AckedBy, st.latch.AckedS = who, t
			st.latch.Phase = Inactive
			e.emitAck(who, t, &st.latch, emit)
			n++
		}
		if c.phase == Active && !acked(&st.ep) {
			st.ep.AckedBy, st.ep.AckedS = who, t
			e.emitAck(who, t, &st.ep, emit)
			n++
		}
	}
	return n
}

func (e *Engine) emitAck(who string, t float64, ep *Episode, emit func(Event)) {
	e.revision++
	if emit != nil {
		emit(Event{Type: EventAcknowledged, T: t, Device: e.device, Episode: *ep, Who: who, Paused: e.pausedAt(t)})
	}
}

// ErrPause is wrapped by Pause errors.
var ErrPause = errors.New("pause")

// Pause stops alarm signals for the stream from t until until (a bounded
// time: at most the profile's pause_max). Evaluation and logging go on:
// events keep coming, with Event.Paused set. A new pause replaces the
// current one. The pause ends by itself at the first Eval/Tick/SetOffline at
// or after until, or by Resume.
func (e *Engine) Pause(who string, t, until float64, emit func(Event)) error {
	if !(until > t) {
		return fmt.Errorf("%w: until %v, want after the start %v", ErrPause, until, t)
	}
	if until-t > e.pauseMax+eps {
		return fmt.Errorf("%w: %gs, want <= pause_max %gs", ErrPause, until-t, e.pauseMax)
	}
	e.pauseUntil, e.pauseFrom, e.pausedBy = until, t, who
	e.revision++
	if emit != nil {
		emit(Event{Type: EventPaused, T: t, Device: e.device, Who: who, Until: until, Paused: true})
	}
	return nil
}

// Resume ends a pause early (nothing happens when not paused).
func (e *Engine) Resume(who string, t float64, emit func(Event)) {
	if math.IsInf(e.pauseUntil, 1) {
		return
	}
	e.endPause(who, t, emit)
}

func (e *Engine) expirePause(emit func(Event)) { e.endPause("", e.pauseUntil, emit) }

func (e *Engine) endPause(who string, t float64, emit func(Event)) {
	e.pauseUntil, e.pauseFrom, e.pausedBy = math.Inf(1), math.NaN(), ""
	e.revision++
	if emit != nil {
		emit(Event{Type: EventResumed, T: t, Device: e.device, Who: who})
	}
}

// Paused reports whether alarm signals are paused at t, by whom and until when.
func (e *Engine) Paused(t float64) (by string, until float64, ok bool) {
	if e.pausedAt(t) {
		return e.pausedBy, e.pauseUntil, true
	}
	return "", math.NaN(), false
}

// SetProfile switches the engine to profile p at time t (an operator
// changed the stream's profile; the change itself belongs in the audit log).
// Conditions kept (same name and kind) keep their state and take the new
// values from the next sample: a pending one keeps its onset and is
// announced when the new delay completes, an active one stays announced at
// its priority and escalates by the new rules, a latched one still waits for
// acknowledgement, and a desaturation baseline keeps its points. For a
// removed condition, a pending episode is withdrawn at t, an active one ends
// at t, and a latched signal is released (EventReleased). New conditions
// start inactive. On error the engine is unchanged.
func (e *Engine) SetProfile(p *Profile, t float64, emit func(Event)) error {
	if p == nil {
		return errors.New("set profile: nil profile")
	}
	if err := p.Validate(); err != nil {
		return fmt.Errorf("set profile %s: %w", p.Name, err)
	}
	n := &Engine{}
	n.compile(p)
	for i := range n.st {
		n.st[i].win.reset()
	}
	kept := make([]bool, len(e.conds))
	for j := range n.conds {
		for i := range e.conds {
			if !kept[i] && e.conds[i].name == n.conds[j].name && e.conds[i].kind == n.conds[j].kind {
				kept[i] = true
				n.conds[j].phase = e.conds[i].phase
				n.st[j] = e.st[i]
				break
			}
		}
	}
	for i := range e.conds {
		if kept[i] {
			continue
		}
		c, st := &e.conds[i], &e.st[i]
		if c.phase != Inactive {
			latching := c.latching
			c.latching = false // a removed condition does not latch
			e.clearCond(c, st, t, emit)
			c.latching = latching
		}
		if st.latched {
			st.latched = false
			st.latch.Phase = Inactive
			e.emitEp(EventReleased, t, &st.latch, emit)
		}
	}
	e.profile, e.conds, e.st, e.tech, e.pauseMax = n.profile, n.conds, n.st, n.tech, n.pauseMax
	e.revision++
	return nil
}
