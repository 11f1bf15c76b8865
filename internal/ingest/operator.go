package ingest

import (
	"context"
	"errors"
	"math"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// What operators change: alarm acknowledgements and pauses, alarm profiles.

// AlarmAction runs fn on a device's alarm engine under its lock, at the
// device's current time, then makes the effects durable before it returns
// the engine's events. why (the note of an acknowledgement, the reason of a
// pause) is added to the audit entries, which also name the caller's
// address remote. fn's error is returned as it is; the others are *Error
// (NotFound, Precondition when no profile applies, Unavailable).
func (p *Pipeline) AlarmAction(ctx context.Context, id, why, remote string, fn func(e *alarms.Engine, t float64, emit func(alarms.Event)) error) ([]alarms.Event, error) {
	d, err := p.lookup(id)
	if err != nil {
		return nil, err
	}
	d.mu.Lock()
	p.ensureEngine(d)
	if d.engine == nil {
		d.mu.Unlock()
		return nil, errorf(Precondition, "device_id: %q has no alarm profile", id)
	}
	t := math.Max(d.deviceTimeS(p.nowMS()), d.engine.LastT())
	var evs []alarms.Event
	if err := fn(d.engine, t, func(e alarms.Event) { evs = append(evs, e) }); err != nil {
		d.mu.Unlock()
		return nil, err
	}
	rec := &record{dev: d}
	p.alarmEffects(d, evs, rec)
	d.mu.Unlock()
	for _, a := range rec.audit {
		a.Remote = remote
		if why != "" {
			a.Detail += "; " + why
		}
	}
	if err := p.w.sync(ctx, rec); err != nil {
		return nil, errorf(Unavailable, "store: %v", err)
	}
	return evs, nil
}

// StoredEpisode is an engine episode of a known device in its stored form
// (nil when the device is unknown).
func (p *Pipeline) StoredEpisode(id string, e *alarms.Episode) *store.Episode {
	d := p.devices.get(id)
	if d == nil {
		return nil
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	return p.storeEpisode(d, e)
}

// Profile returns the alarm profile that applies to a device ("" = the
// default one) and where it comes from: "device" (set for it) or
// "default". The profile is nil when none is configured.
func (p *Pipeline) Profile(id string) (*alarms.Profile, string, error) {
	if id != "" {
		d, err := p.lookup(id)
		if err != nil {
			return nil, "", err
		}
		d.mu.Lock()
		own, prof := d.ownProfile, d.profile
		d.mu.Unlock()
		if own {
			return prof, "device", nil
		}
	}
	p.defaultMu.RLock()
	defer p.defaultMu.RUnlock()
	return p.defaultProfile, "default", nil
}

// SetProfile stores prof (parsed from text) as a device's profile, or as
// the default one when id is "" (devices with a profile of their own keep
// it), and applies it from the next sample; open episodes carry over (see
// alarms.Engine.SetProfile). audit is stored with the profile.
func (p *Pipeline) SetProfile(ctx context.Context, id string, text []byte, prof *alarms.Profile, audit *store.AuditEntry) error {
	targets := p.devices.all()
	if id != "" {
		d, err := p.lookup(id)
		if err != nil {
			return err
		}
		targets = []*device{d}
	}
	if err := p.db.SetProfile(id, text, audit); err != nil {
		return errorf(Unavailable, "store: %v", err)
	}
	if id == "" {
		p.defaultMu.Lock()
		p.defaultProfile = prof
		p.defaultMu.Unlock()
	}
	for _, d := range targets {
		d.mu.Lock()
		if id == "" && d.ownProfile {
			d.mu.Unlock()
			continue
		}
		var evs []alarms.Event
		if d.engine != nil {
			t := math.Max(d.deviceTimeS(p.nowMS()), d.engine.LastT())
			if err := d.engine.SetProfile(prof, t, func(e alarms.Event) { evs = append(evs, e) }); err != nil {
				d.mu.Unlock()
				return errorf(Precondition, "device %s: %v", d.id, err)
			}
		}
		d.profile = prof
		d.ownProfile = id != ""
		rec := &record{dev: d}
		p.alarmEffects(d, evs, rec)
		d.mu.Unlock()
		if err := p.w.sync(ctx, rec); err != nil && !errors.Is(err, errWriterClosed) {
			return errorf(Unavailable, "store: %v", err)
		}
	}
	return nil
}

// ForgetLatest drops a device's live latest point when its time lies in
// [fromMS, toMS) (its stored history was deleted).
func (p *Pipeline) ForgetLatest(device string, fromMS, toMS int64) {
	d := p.devices.get(device)
	if d == nil {
		return
	}
	d.mu.Lock()
	if d.latest != nil && d.latest.GetTimeUnixMs() >= fromMS && d.latest.GetTimeUnixMs() < toMS {
		d.latest = nil
	}
	d.mu.Unlock()
}
