package alarms

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
)

// StateVersion is the version of State written by Snapshot.
const StateVersion = 1

// State is a JSON-able snapshot of an Engine: everything needed to continue
// evaluation after a restart exactly as if it had not happened. Persist it
// whenever Engine.Revision changes (each emitted event); persisting more
// often (e.g. with each batch of trend points) also keeps the running
// minimum, oxygen deficit and desaturation baseline exact.
type State struct {
	Version    int              `json:"version"`
	Device     string           `json:"device"`
	Profile    string           `json:"profile"` // name of the profile in effect
	Revision   uint64           `json:"revision"`
	NextID     uint64           `json:"next_id"`                 // ID of the last episode started
	LastS      *float64         `json:"last_s,omitempty"`        // time of the last evaluated sample
	PrevSpO2   *float64         `json:"prev_spo2_pct,omitempty"` // its valid SpO2
	Offline    bool             `json:"offline,omitempty"`
	ClockFault bool             `json:"clock_fault,omitempty"`
	Pause      *PauseState      `json:"pause,omitempty"`
	Conditions []ConditionState `json:"conditions"`
}

// PauseState is a pause in effect.
type PauseState struct {
	By     string  `json:"by"`
	FromS  float64 `json:"from_s"`
	UntilS float64 `json:"until_s"`
}

// ConditionState is the state of one condition of the profile.
type ConditionState struct {
	Name    string   `json:"name"`
	Kind    Kind     `json:"kind"`
	Episode *Episode `json:"episode,omitempty"` // pending or active episode
	Latched *Episode `json:"latched,omitempty"` // latched episode awaiting acknowledgement
	// Window is the desaturation baseline deque: [t_s, spo2_pct] pairs, oldest first.
	Window [][2]float64 `json:"window,omitempty"`
}

func optF(f float64) *float64 {
	if f != f || math.IsInf(f, 0) {
		return nil
	}
	return &f
}

func fromOpt(p *float64) float64 {
	if p == nil {
		return math.NaN()
	}
	return *p
}

// Snapshot returns the engine's state. It shares nothing with the engine.
func (e *Engine) Snapshot() State {
	s := State{Version: StateVersion, Device: e.device, Profile: e.profile.Name,
		Revision: e.revision, NextID: e.nextID, LastS: optF(e.lastT),
		PrevSpO2: optF(e.prevSpO2), Offline: e.offline, ClockFault: e.clockFault}
	if !math.IsInf(e.pauseUntil, 1) {
		s.Pause = &PauseState{By: e.pausedBy, FromS: e.pauseFrom, UntilS: e.pauseUntil}
	}
	s.Conditions = make([]ConditionState, len(e.conds))
	for i := range e.conds {
		c, st := &e.conds[i], &e.st[i]
		cs := ConditionState{Name: c.name, Kind: c.kind}
		if c.phase != Inactive {
			ep := st.ep
			cs.Episode = &ep
		}
		if st.latched {
			ep := st.latch
			cs.Latched = &ep
		}
		for _, p := range st.win.points() {
			cs.Window = append(cs.Window, [2]float64{p.t, p.v})
		}
		s.Conditions[i] = cs
	}
	return s
}

// ErrState is wrapped by Restore errors.
var ErrState = errors.New("alarm state")

// Restore builds an engine for profile p from a snapshot, before anything is
// evaluated. It emits nothing: restored active episodes stay announced (they
// are never announced again), pending ones keep their onset and announce
// when their delay completes, latched ones still wait for acknowledgement.
// Samples at or before the snapshot's last sample time are ignored, so
// resent samples do not count twice.
//
// Conditions are matched by name and kind. The profile may have gained
// conditions (they start inactive) or changed values (they apply from the
// next sample); a condition with an open or latched episode must still
// exist, else Restore fails rather than lose the episode.
func Restore(p *Profile, st State) (*Engine, error) {
	if st.Version != StateVersion {
		return nil, fmt.Errorf("%w: version %d, want %d", ErrState, st.Version, StateVersion)
	}
	e, err := NewEngine(p, st.Device)
	if err != nil {
		return nil, fmt.Errorf("restore: %w", err)
	}
	idx := make(map[string]int, len(e.conds))
	for i := range e.conds {
		idx[e.conds[i].name] = i
	}
	for j, cs := range st.Conditions {
		i, ok := idx[cs.Name]
		if !ok || e.conds[i].kind != cs.Kind {
			if cs.Episode != nil || cs.Latched != nil {
				return nil, fmt.Errorf("%w: conditions[%d] %s (%s) has an open episode but profile %s has no such condition", ErrState, j, cs.Name, cs.Kind, p.Name)
			}
			continue
		}
		c, s := &e.conds[i], &e.st[i]
		if ep := cs.Episode; ep != nil {
			if ep.Phase != Pending && ep.Phase != Active {
				return nil, fmt.Errorf("%w: conditions[%d].episode.phase %s, want pending or active", ErrState, j, ep.Phase)
			}
			if ep.ID > st.NextID || ep.Kind != c.kind {
				return nil, fmt.Errorf("%w: conditions[%d].episode: id %d / kind %s inconsistent with next_id %d / kind %s", ErrState, j, ep.ID, ep.Kind, st.NextID, c.kind)
			}
			c.phase, s.ep = ep.Phase, *ep
			s.ref = ep.Limit
			if c.kind == Desaturation {
				s.base, s.ref = ep.Baseline, ep.Baseline
			}
		}
		if ep := cs.Latched; ep != nil {
			if ep.Phase != Latched {
				return nil, fmt.Errorf("%w: conditions[%d].latched.phase %s, want latched", ErrState, j, ep.Phase)
			}
			s.latched, s.latch = true, *ep
		}
		for _, pt := range cs.Window {
			if c.kind != Desaturation {
				return nil, fmt.Errorf("%w: conditions[%d].window: only desaturation has one", ErrState, j)
			}
			s.win.push(pt[0], pt[1], math.Inf(1))
		}
	}
	e.nextID, e.revision = st.NextID, st.Revision
	if st.LastS != nil {
		e.lastT = *st.LastS
	}
	e.prevSpO2 = fromOpt(st.PrevSpO2)
	e.offline, e.clockFault = st.Offline, st.ClockFault
	if ps := st.Pause; ps != nil {
		e.pauseUntil, e.pauseFrom, e.pausedBy = ps.UntilS, ps.FromS, ps.By
	}
	return e, nil
}

// episodeJSON is Episode with "not yet" (NaN) times as null.
type episodeJSON struct {
	ID              uint64   `json:"id"`
	Device          string   `json:"device"`
	Condition       string   `json:"condition"`
	Kind            Kind     `json:"kind"`
	Priority        Priority `json:"priority"`
	Phase           Phase    `json:"phase"`
	OnsetS          *float64 `json:"onset_s"`
	AnnouncedS      *float64 `json:"announced_s"`
	EscalatedS      *float64 `json:"escalated_s"`
	EndedS          *float64 `json:"ended_s"`
	MinSpO2         *float64 `json:"min_spo2_pct"`
	DeficitPctS     float64  `json:"deficit_pct_s"`
	Limit           *float64 `json:"limit"`
	Baseline        *float64 `json:"baseline_pct,omitempty"`
	AckedBy         string   `json:"acked_by,omitempty"`
	AckedS          *float64 `json:"acked_s"`
	AnnouncedPaused bool     `json:"announced_paused,omitempty"`
}

// MarshalJSON encodes times that have not happened (NaN) as null.
func (ep Episode) MarshalJSON() ([]byte, error) {
	return json.Marshal(episodeJSON{ep.ID, ep.Device, ep.Condition, ep.Kind, ep.Priority, ep.Phase,
		optF(ep.OnsetS), optF(ep.AnnouncedS), optF(ep.EscalatedS), optF(ep.EndedS), optF(ep.MinSpO2),
		ep.DeficitPctS, optF(ep.Limit), optF(ep.Baseline), ep.AckedBy, optF(ep.AckedS), ep.AnnouncedPaused})
}

// UnmarshalJSON decodes null times as NaN.
func (ep *Episode) UnmarshalJSON(b []byte) error {
	var j episodeJSON
	if err := json.Unmarshal(b, &j); err != nil {
		return err
	}
	*ep = Episode{ID: j.ID, Device: j.Device, Condition: j.Condition, Kind: j.Kind, Priority: j.Priority,
		Phase: j.Phase, OnsetS: fromOpt(j.OnsetS), AnnouncedS: fromOpt(j.AnnouncedS),
		EscalatedS: fromOpt(j.EscalatedS), EndedS: fromOpt(j.EndedS), MinSpO2: fromOpt(j.MinSpO2),
		DeficitPctS: j.DeficitPctS, Limit: fromOpt(j.Limit), Baseline: fromOpt(j.Baseline),
		AckedBy: j.AckedBy, AckedS: fromOpt(j.AckedS), AnnouncedPaused: j.AnnouncedPaused}
	return nil
}
