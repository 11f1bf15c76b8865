package ingest

import (
	"context"
	"sync"
	"sync/atomic"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Settings that reach a gateway from a fleet's shared control plane
// before, or while, its devices stream here.

// aheadProfiles holds per-device profiles of devices this gateway has not
// seen yet (set through another gateway of the fleet, or stored before a
// restart): a device takes its own when it first appears here.
type aheadProfiles struct {
	mu sync.Mutex
	m  map[string]*alarms.Profile
}

func (a *aheadProfiles) put(id string, prof *alarms.Profile) {
	if a.m == nil {
		a.m = map[string]*alarms.Profile{}
	}
	a.m[id] = prof
}

// profileFor is the profile a device's alarm engine gets: its own, one
// held for it before it appeared here (taken now), or the default.
// Caller holds d.mu.
func (p *Pipeline) profileFor(d *device) *alarms.Profile {
	if d.profile == nil {
		p.ahead.mu.Lock()
		if prof, ok := p.ahead.m[d.id]; ok {
			d.profile, d.ownProfile = prof, true
			delete(p.ahead.m, d.id)
		}
		p.ahead.mu.Unlock()
	}
	if d.profile != nil {
		return d.profile
	}
	p.defaultMu.RLock()
	defer p.defaultMu.RUnlock()
	return p.defaultProfile
}

// SetProfileAhead is SetProfile for a fleet: a device this gateway has not
// seen yet gets its profile stored (with audit) and held, in force from
// its first connection here; a known device gets it as SetProfile does.
// It reports whether the device was unknown.
func (p *Pipeline) SetProfileAhead(ctx context.Context, id string, text []byte, prof *alarms.Profile, audit *store.AuditEntry) (bool, error) {
	if id != "" {
		p.ahead.mu.Lock()
		if p.devices.get(id) == nil {
			defer p.ahead.mu.Unlock()
			if audit != nil {
				audit.Detail += "; device not seen here yet: in force from its first connection"
			}
			if err := p.db.SetProfile(id, text, audit); err != nil {
				return true, errorf(Unavailable, "store: %v", err)
			}
			p.ahead.put(id, prof)
			return true, nil
		}
		p.ahead.mu.Unlock()
	}
	return false, p.SetProfile(ctx, id, text, prof, audit)
}

// liveCal is the calibration of a raw stream whose curve comes from an
// assignment: Recalibrate swaps it while the stream runs, so the next
// estimate uses the new curve (the estimator keeps its state; only the
// mapping from R to SpO2 changes).
type liveCal struct {
	c atomic.Pointer[estimator.Calibration]
}

func newLiveCal(c estimator.Calibration) *liveCal {
	l := &liveCal{}
	l.set(c)
	return l
}

func (l *liveCal) set(c estimator.Calibration) {
	if c == nil {
		c = estimator.Empirical()
	}
	if anchored(c) {
		c = estimator.NoCalibration() // never a curve on R/R0 applied to R (callers keep it out)
	}
	l.c.Store(&c)
}

func (l *liveCal) SpO2(r float64) (float64, bool) { return (*l.c.Load()).SpO2(r) }

// Recalibrate puts a changed calibration assignment in force on the open
// raw streams it concerns: those of devices that did not ask for a
// calibration and that match (their id and model) get the curve
// Config.Calibration resolves now, from their next estimate on, and their
// stored description names it. A curve that cannot be resolved leaves the
// stream on its curve, logged as an error. It returns how many streams
// changed curve.
func (p *Pipeline) Recalibrate(ctx context.Context, match func(device, model string) bool) int {
	p.calGen.Add(1) // after the caller changed the assignments: see catchUpCalibration
	n := 0
	for _, d := range p.devices.all() {
		d.mu.Lock()
		s := d.stream
		if s == nil || s.live == nil || !match(d.id, d.desc.Model) {
			d.mu.Unlock()
			continue
		}
		cal, ref, err := p.cfg.Calibration(d.id, d.desc.Model, "", s.redNM, s.irNM)
		if err != nil {
			d.mu.Unlock()
			p.log.Error("changed calibration assignment not applied to an open stream; it keeps its curve", "device", d.id, "calibration", d.desc.Calibration, "err", err)
			continue
		}
		if ref == d.desc.Calibration {
			d.mu.Unlock()
			continue
		}
		if anchored(cal) {
			d.mu.Unlock()
			p.log.Warn("changed calibration assignment is a curve on the anchored ratio: in force from the device's next connection, which starts its room-air anchor; the open stream keeps its curve",
				"device", d.id, "calibration", d.desc.Calibration, "assigned", ref)
			continue
		}
		s.live.set(cal)
		old := d.desc.Calibration
		d.desc.Calibration = ref
		desc := d.desc
		d.mu.Unlock()
		n++
		p.log.Info("calibration changed on an open stream", "device", d.id, "from", old, "to", ref)
		if err := p.w.submit(context.WithoutCancel(ctx), &record{dev: d, desc: &desc}); err != nil {
			p.log.Error("storing a device's new calibration", "device", d.id, "err", err)
		}
	}
	return n
}

// catchUpCalibration closes the window between a stream resolving its
// assigned calibration (stream.start) and becoming its device's (attach),
// where Recalibrate cannot see it: when an assignment changed meanwhile,
// the stream resolves it again. Caller holds d.mu (attach).
func (s *stream) catchUpCalibration(model string) {
	p := s.p
	if s.live == nil || p.calGen.Load() == s.calGen {
		return
	}
	cal, ref, err := p.cfg.Calibration(s.dev.id, model, "", s.redNM, s.irNM)
	switch {
	case err != nil:
		p.log.Error("changed calibration assignment not applied to a starting stream; it keeps its curve", "device", s.dev.id, "calibration", s.calRef, "err", err)
	case anchored(cal):
		p.log.Warn("changed calibration assignment is a curve on the anchored ratio: in force from the device's next connection", "device", s.dev.id, "assigned", ref)
	case ref != s.calRef:
		s.live.set(cal)
		s.calRef = ref
	}
}
