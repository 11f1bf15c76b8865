package alarms

import (
	"errors"
	"fmt"
	"math"
)

// eps is the tolerance, in seconds and in SpO2 points, for comparisons of
// computed differences (t - onset >= delay, baseline - SpO2 >= drop), so that
// decimal sample times like 25.1 - 10.1 meet a 15 s delay.
const eps = 1e-6

// Value slots of one sample as the engine sees it.
const (
	slotSpO2    = iota // %
	slotPulse          // /min
	slotPI             // %
	slotSQI            // 0..1
	slotNone           // always NaN: conditions fed outside samples (device_offline, device_clock_fault)
	slotPresent        // 1 when SpO2 is valid, 0 when not (signal_lost)
	numSlots
)

// cond is a compiled Condition. For high-direction kinds values and limits
// are negated (sign -1) so that every comparison reads like spo2_low:
// present when sign*v < limit, cleared when sign*v >= clear, escalated when
// sign*v < esc.
type cond struct {
	name     string
	kind     Kind
	slot     uint8
	latching bool
	deficit  bool // integrate SpO2 below the reference
	sign     float64
	limit    float64 // signed
	clear    float64 // signed: limit + hysteresis
	esc      float64 // signed depth for escalation; -Inf = none
	drop     float64 // desaturation: drop in points
	hyst     float64 // desaturation: hysteresis in points
	window   float64 // desaturation: baseline window (s)
	delay    float64 // s
	escAfter float64 // s; +Inf = none
	prio     Priority
	escPrio  Priority // None = never escalates
	phase    Phase    // state: Inactive, Pending or Active (Latched lives in condState); kept here, beside the limit, for the hot path
}

// condState is the live state of one condition.
type condState struct {
	ep      Episode // current episode while Pending or Active
	ref     float64 // deficit reference (limit, or desaturation baseline)
	base    float64 // desaturation: frozen baseline of the current episode
	latched bool
	latch   Episode // the latched episode waiting for acknowledgement
	win     window  // desaturation running maximum
}

// Engine evaluates one stream's samples against a profile. It is pure and
// deterministic: time comes only from the arguments. It is not safe for
// concurrent use; the stream's goroutine owns it.
//
// Every method that changes state takes an emit callback (nil is allowed)
// and calls it synchronously for each Event, in order; Revision increases
// with each one. The hot path (Eval) does not allocate.
type Engine struct {
	profile *Profile
	device  string
	conds   []cond
	st      []condState
	tech    []int // indexes of signal_lost, device_offline and device_clock_fault conditions

	lastT      float64 // time of the last evaluated sample; -Inf before the first
	prevSpO2   float64 // valid SpO2 of the last sample, NaN if it had none
	offline    bool
	clockFault bool

	pauseUntil float64 // +Inf when not paused
	pauseFrom  float64
	pausedBy   string
	pauseMax   float64

	nextID   uint64
	revision uint64
	ignored  uint64

	runOut  func(Episode) // Run's callback
	runEmit func(Event)   // bound once: e.runEvent
}

// NewEngine compiles a validated copy of p for one stream. device names the
// stream in episodes and events.
func NewEngine(p *Profile, device string) (*Engine, error) {
	if p == nil {
		return nil, errors.New("new engine: nil profile")
	}
	if err := p.Validate(); err != nil {
		return nil, fmt.Errorf("new engine: profile %s: %w", p.Name, err)
	}
	e := &Engine{device: device}
	e.compile(p)
	e.runEmit = e.runEvent
	e.Reset()
	return e, nil
}

func secs(d interface{ Seconds() float64 }) float64 { return d.Seconds() }

func (e *Engine) compile(p *Profile) {
	e.profile = p.Clone()
	pcs := p.Conditions
	if !hasKind(p, DeviceClockFault) {
		// The technical condition for a refused device clock cannot be
		// left out: a profile without one gets DefaultClockFault.
		pcs = append(pcs[:len(pcs):len(pcs)], DefaultClockFault)
	}
	e.conds = make([]cond, len(pcs))
	e.st = make([]condState, len(pcs))
	e.tech = e.tech[:0]
	e.pauseMax = secs(DefaultPauseMax)
	if p.PauseMax > 0 {
		e.pauseMax = secs(p.PauseMax)
	}
	for i := range pcs {
		pc := &pcs[i]
		ki := kinds[pc.Kind]
		c := cond{name: pc.ConditionName(), kind: pc.Kind, latching: pc.Latching, sign: 1,
			limit: pc.Limit, clear: pc.Limit + pc.Hysteresis, esc: math.Inf(-1),
			delay: secs(pc.Delay), escAfter: math.Inf(1), prio: pc.Priority}
		switch ki.field {
		case fieldSpO2:
			c.slot = slotSpO2
		case fieldPulse:
			c.slot = slotPulse
		case fieldPI:
			c.slot = slotPI
		case fieldSQI:
			c.slot = slotSQI
		}
		if ki.high {
			c.sign, c.limit, c.clear = -1, -pc.Limit, -(pc.Limit - pc.Hysteresis)
		}
		switch pc.Kind {
		case SignalLost, DeviceOffline, DeviceClockFault:
			// 0 = no valid SpO2 / offline / clock refused, 1 = valid / online / clock trusted.
			c.slot, c.limit, c.clear = slotPresent, 0.5, 1
			if pc.Kind != SignalLost {
				c.slot = slotNone
			}
			e.tech = append(e.tech, i)
		case Desaturation:
			c.drop, c.hyst = pc.Limit, pc.Hysteresis
			c.window = secs(DefaultBaseline)
			if pc.Baseline > 0 {
				c.window = secs(pc.Baseline)
			}
			c.deficit = true
		case SpO2Low:
			c.deficit = true
		}
		if es := pc.Escalate; es != nil {
			c.escPrio = es.Priority
			if es.After > 0 {
				c.escAfter = secs(es.After)
			}
			if es.Below > 0 {
				c.esc = es.Below
			}
			if es.Above > 0 {
				c.esc = -es.Above
			}
		}
		e.conds[i] = c
	}
}

func hasKind(p *Profile, k Kind) bool {
	for i := range p.Conditions {
		if p.Conditions[i].Kind == k {
			return true
		}
	}
	return false
}

// Reset returns the engine to its freshly created state (no episodes, not
// paused, online, clock trusted), keeping its buffers. Episode IDs start
// again at 1.
func (e *Engine) Reset() {
	e.lastT = math.Inf(-1)
	e.prevSpO2 = math.NaN()
	e.offline, e.clockFault = false, false
	e.pauseUntil, e.pauseFrom, e.pausedBy = math.Inf(1), math.NaN(), ""
	e.nextID, e.revision, e.ignored = 0, 0, 0
	for i := range e.st {
		w := e.st[i].win
		w.reset()
		e.st[i] = condState{win: w}
		e.conds[i].phase = Inactive
	}
}

// Profile returns the engine's copy of its profile (do not modify it).
func (e *Engine) Profile() *Profile { return e.profile }

// Device returns the stream name given to NewEngine.
func (e *Engine) Device() string { return e.device }

// Revision counts state changes: it increases with every emitted event (and
// with SetOffline and SetProfile changes). Persist a Snapshot whenever it
// differs from the one last persisted. The running minimum, deficit and
// desaturation baseline change with every sample without an event; to keep
// them exact across a restart, write the snapshot in the same transaction as
// the trend points it has seen (then Restore plus the device's resend from
// the durable point continues exactly), or accept that they restart from the
// last event.
func (e *Engine) Revision() uint64 { return e.revision }

// Ignored counts samples skipped because their time was not after the last
// evaluated sample (duplicates after a resend, out-of-order, NaN time).
func (e *Engine) Ignored() uint64 { return e.ignored }

// LastT returns the time of the last evaluated sample (-Inf before any).
func (e *Engine) LastT() float64 { return e.lastT }

// Eval evaluates one sample. Samples whose T is not after the previous
// evaluated sample's are ignored (so a resent sample is never counted twice).
//
// Per condition, following the profile contract: the condition becomes
// present at the first sample beyond the limit and stays present until a
// sample at or past limit ± hysteresis; a missing value changes neither, but
// time still passes, so an alarm may be announced (present for >= delay) or
// escalated by duration at a sample whose value is missing. Escalation by
// depth needs a valid value.
func (e *Engine) Eval(s Sample, emit func(Event)) {
	t := s.T
	if !(t > e.lastT) {
		e.ignored++
		return
	}
	if t >= e.pauseUntil {
		e.expirePause(emit)
	}
	var v [numSlots]float64
	v[slotSpO2], v[slotPulse], v[slotPI], v[slotSQI] = math.NaN(), math.NaN(), math.NaN(), math.NaN()
	v[slotNone] = math.NaN()
	if s.SpO2 > 0 && s.SpO2 <= 100 {
		v[slotSpO2], v[slotPresent] = s.SpO2, 1
	}
	if s.Pulse > 0 && s.Pulse <= 350 {
		v[slotPulse] = s.Pulse
	}
	if s.PI >= 0 && s.PI <= 100 {
		v[slotPI] = s.PI
	}
	if s.SQI >= 0 && s.SQI <= 1 {
		v[slotSQI] = s.SQI
	}
	spo2 := v[slotSpO2]
	for i := range e.conds {
		c := &e.conds[i]
		if c.kind == Desaturation {
			e.evalDesat(c, &e.st[i], t, spo2, emit)
			continue
		}
		x := c.sign * v[c.slot]
		if c.phase == Inactive && !(x < c.limit) {
			continue // the common case touches only c
		}
		st := &e.st[i]
		if c.phase == Inactive {
			e.onset(c, st, t, spo2, c.sign*c.limit, emit)
		} else {
			e.accumulate(c, st, t, spo2)
			if x >= c.clear {
				e.clearCond(c, st, t, emit)
				continue
			}
		}
		e.advance(c, st, t, x, emit)
	}
	e.lastT = t
	e.prevSpO2 = spo2
}

// accumulate updates the minimum SpO2 and the oxygen deficit of an open
// episode at a new sample: the previous sample's SpO2 (if valid) is held
// until t.
func (e *Engine) accumulate(c *cond, st *condState, t, spo2 float64) {
	if c.deficit {
		if d := st.ref - e.prevSpO2; d > 0 { // false when prevSpO2 is NaN
			st.ep.DeficitPctS += d * (t - e.lastT)
		}
	}
	if spo2 < st.ep.MinSpO2 || st.ep.MinSpO2 != st.ep.MinSpO2 {
		if spo2 == spo2 {
			st.ep.MinSpO2 = spo2
		}
	}
}

func (e *Engine) evalDesat(c *cond, st *condState, t, spo2 float64, emit func(Event)) {
	if spo2 == spo2 {
		st.win.push(t, spo2, c.window)
	}
	if c.phase == Inactive {
		if spo2 != spo2 {
			return
		}
		base := st.win.max()
		if !(base-spo2 >= c.drop-eps) {
			return
		}
		st.base = base
		e.onset(c, st, t, spo2, base-c.drop, emit)
	} else {
		e.accumulate(c, st, t, spo2)
		if st.base-spo2 < c.drop-c.hyst-eps { // false when spo2 is NaN
			e.clearCond(c, st, t, emit)
			return
		}
	}
	e.advance(c, st, t, spo2, emit)
}

func (e *Engine) onset(c *cond, st *condState, t, spo2, limit float64, emit func(Event)) {
	e.nextID++
	nan := math.NaN()
	if !kinds[c.kind].hasLimit {
		limit = nan // signal_lost, device_offline
	}
	c.phase = Pending
	st.ep = Episode{ID: e.nextID, Device: e.device, Condition: c.name, Kind: c.kind,
		Priority: c.prio, Phase: Pending, OnsetS: t, AnnouncedS: nan, EscalatedS: nan,
		EndedS: nan, MinSpO2: spo2, Limit: limit, Baseline: nan, AckedS: nan}
	st.ref = limit
	if c.kind == Desaturation {
		st.ep.Baseline = st.base
		st.ref = st.base
	}
	e.emitEp(EventOnset, t, &st.ep, emit)
}

// advance announces and escalates a present condition as time passes. x is
// the signed value (NaN when missing).
func (e *Engine) advance(c *cond, st *condState, t, x float64, emit func(Event)) {
	if c.phase == Pending {
		if t-st.ep.OnsetS < c.delay-eps {
			return
		}
		c.phase = Active
		st.ep.Phase = Active
		st.ep.AnnouncedS = t
		st.ep.AnnouncedPaused = e.pausedAt(t)
		e.emitEp(EventAnnounced, t, &st.ep, emit)
	}
	if c.escPrio != PriorityNone && st.ep.EscalatedS != st.ep.EscalatedS &&
		(x < c.esc || t-st.ep.OnsetS >= c.escAfter-eps) {
		st.ep.EscalatedS = t
		st.ep.Priority = c.escPrio
		e.emitEp(EventEscalated, t, &st.ep, emit)
	}
}

// clearCond ends the current episode at t: withdrawn if still pending, ended
// (and latched, for a latching condition not acknowledged since its last
// escalation) if active.
func (e *Engine) clearCond(c *cond, st *condState, t float64, emit func(Event)) {
	st.ep.EndedS = t
	if c.phase == Pending {
		c.phase = Inactive
		st.ep.Phase = Inactive
		e.emitEp(EventWithdrawn, t, &st.ep, emit)
		return
	}
	c.phase = Inactive
	st.ep.Phase = Inactive
	if c.latching && !acked(&st.ep) {
		st.ep.Phase = Latched
		st.latched = true
		st.latch = st.ep
	}
	e.emitEp(EventEnded, t, &st.ep, emit)
}

// acked reports whether ep has an acknowledgement that covers its current
// priority (given after its last escalation).
func acked(ep *Episode) bool {
	return ep.AckedS == ep.AckedS && !(ep.EscalatedS > ep.AckedS)
}

// pausedAt reports whether alarm signals are paused at t.
func (e *Engine) pausedAt(t float64) bool { return e.pauseFrom <= t && t < e.pauseUntil }

func (e *Engine) emitEp(typ EventType, t float64, ep *Episode, emit func(Event)) {
	e.revision++
	if e.runOut != nil && typ != EventEnded {
		return // Run reports only ended episodes: skip building the others
	}
	if emit != nil {
		emit(Event{Type: typ, T: t, Device: e.device, Episode: *ep, Paused: e.pausedAt(t)})
	}
}

// Tick lets time pass without a sample, for the conditions the gateway
// times itself: signal_lost and device_offline are announced and escalated
// by duration at t as at a sample. Other conditions move only with samples.
// A pause that has expired by t ends.
func (e *Engine) Tick(t float64, emit func(Event)) {
	if t != t {
		return
	}
	if t >= e.pauseUntil {
		e.expirePause(emit)
	}
	for _, i := range e.tech {
		if e.conds[i].phase != Inactive {
			e.advance(&e.conds[i], &e.st[i], t, math.NaN(), emit)
		}
	}
}

// SetOffline reports that the device went offline (or came back) at t. It
// drives device_offline conditions: present from the offline report, cleared
// by the online report.
func (e *Engine) SetOffline(offline bool, t float64, emit func(Event)) {
	if t != t {
		return
	}
	if t >= e.pauseUntil {
		e.expirePause(emit)
	}
	if e.offline != offline {
		e.offline = offline
		e.revision++ // part of the snapshot even without a device_offline condition
	}
	x := 1.0
	if offline {
		x = 0
	}
	for _, i := range e.tech {
		c, st := &e.conds[i], &e.st[i]
		if c.kind != DeviceOffline {
			continue
		}
		if c.phase == Inactive {
			if !offline {
				continue
			}
			e.onset(c, st, t, math.NaN(), c.limit, emit)
		} else if x >= c.clear {
			e.clearCond(c, st, t, emit)
			continue
		}
		e.advance(c, st, t, x, emit)
	}
}

// Offline reports the last SetOffline state.
func (e *Engine) Offline() bool { return e.offline }

// SetClockFault reports at t that the gateway refuses or distrusts the
// device's clock (fault) or trusts it again. It drives the
// device_clock_fault condition like SetOffline drives device_offline:
// present from the first fault report, announced once present for its
// delay (at a later report or Tick), cleared by the first report of a
// trusted clock. It never changes the time of the last evaluated sample.
func (e *Engine) SetClockFault(fault bool, t float64, emit func(Event)) {
	if t != t {
		return
	}
	if t >= e.pauseUntil {
		e.expirePause(emit)
	}
	if e.clockFault != fault {
		e.clockFault = fault
		e.revision++
	}
	x := 1.0
	if fault {
		x = 0
	}
	for _, i := range e.tech {
		c, st := &e.conds[i], &e.st[i]
		if c.kind != DeviceClockFault {
			continue
		}
		if c.phase == Inactive {
			if !fault {
				continue
			}
			e.onset(c, st, t, math.NaN(), c.limit, emit)
		} else if x >= c.clear {
			e.clearCond(c, st, t, emit)
			continue
		}
		e.advance(c, st, t, x, emit)
	}
}

// ClockFault reports the last SetClockFault state.
func (e *Engine) ClockFault() bool { return e.clockFault }

// Rewind brings an engine whose clock is ahead of t back to t: the time of
// the last evaluated sample becomes t, so samples after t are evaluated
// again. It is for a state that carries a future time (restored from a store
// written before device times were bounded, or a gateway clock stepped
// back); every change errs towards announcing: open episodes keep their
// phase and any time after t moves to t (a pending episode is announced no
// later than its delay after t), desaturation baselines start afresh, and a
// pause that starts after t or would last beyond pause_max from t ends at
// once. It reports whether anything changed.
func (e *Engine) Rewind(t float64, emit func(Event)) bool {
	if !(e.lastT > t) || t != t {
		return false
	}
	e.lastT = t
	for i := range e.st {
		st := &e.st[i]
		if e.conds[i].phase != Inactive {
			for _, f := range []*float64{&st.ep.OnsetS, &st.ep.AnnouncedS, &st.ep.EscalatedS, &st.ep.AckedS} {
				if *f > t {
					*f = t
				}
			}
		}
		st.win.reset()
	}
	if !math.IsInf(e.pauseUntil, 1) && (e.pauseFrom > t || e.pauseUntil > t+e.pauseMax) {
		e.endPause("", t, emit)
	}
	e.revision++
	return true
}

// Priority returns the stream's priority: the highest of its active and
// latched episodes (PriorityNone when there is none).
func (e *Engine) Priority() Priority {
	p := PriorityNone
	for i := range e.st {
		c, st := &e.conds[i], &e.st[i]
		if c.phase == Active && st.ep.Priority > p {
			p = st.ep.Priority
		}
		if st.latched && st.latch.Priority > p {
			p = st.latch.Priority
		}
	}
	return p
}

// Episodes appends the open episodes (pending, active, latched) to dst in
// profile order and returns it.
func (e *Engine) Episodes(dst []Episode) []Episode {
	for i := range e.st {
		c, st := &e.conds[i], &e.st[i]
		if c.phase != Inactive {
			dst = append(dst, st.ep)
		}
		if st.latched {
			dst = append(dst, st.latch)
		}
	}
	return dst
}
