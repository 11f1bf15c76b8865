package ingest

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Config is what a Pipeline needs from the server that carries it. Every
// field is required (internal/gateway fills them from its Options, with
// their defaults).
type Config struct {
	Store      *store.DB
	Registerer prometheus.Registerer // receives the pipeline's metrics (metrics.go)
	Log        *slog.Logger
	Now        func() time.Time // the gateway clock

	BatchDelay      time.Duration // a batch collects this long after its first record (and is paced: writer.go)
	BatchRecords    int           // a batch commits early when this many records wait
	MaxMessageBytes int           // larger device messages are rejected (TOO_LARGE)
	MaxChunkSamples int           // samples per raw chunk
	LateAfter       time.Duration // a message this far behind the gateway clock counts as late
	SendStall       time.Duration // a stream whose device takes no answer for this long is ended
	CaptureRaw      bool          // keep the raw samples of raw streams
	TrendDays       int           // trend retention; a device silent longer loses its labelled series (0 = kept)
	DefaultProfile  *alarms.Profile

	// Limits returns the per-stream limits in effect; a stream reads them
	// when it handles its first message after the introduction.
	Limits func() Limits
	// Owner returns the address of the gateway that owns a device, or ""
	// when this one does (a device owned elsewhere is redirected there).
	Owner func(deviceID string) string
	// Fence, when set (a fleet on etcd), holds each accepted stream's
	// device fence (fence.go); nil = no fences.
	Fence Fence
	// Alarms, when set (a fleet on etcd), carries alarm state between the
	// gateways (fence.go); nil = this gateway's store only.
	Alarms AlarmShare
	// Authorize checks that the stream's caller may speak for deviceID; its
	// error ends the stream as it is.
	Authorize func(ctx context.Context, deviceID string) error
	// Calibration resolves the curve of a raw stream from the reference the
	// device asked for ("" = whatever is assigned to it or its model). Its
	// error is told to the device as an invalid introduction.calibration_id.
	Calibration func(deviceID, model, requested string, redNM, irNM float64) (estimator.Calibration, string, error)
}

// Limits bound what one device stream may send.
type Limits struct {
	Messages        float64       // sustained messages per second
	Burst           int           // messages at once above that
	DeviceTime      float64       // device seconds per second of gateway time
	DeviceTimeBurst time.Duration // device time at once above that
}

// Pipeline is the per-device ingest path of one gateway: the device
// registry, the streams feeding it, the batched store writer, and the live
// fan-out. Create it with New; run its writer with RunWriter.
type Pipeline struct {
	cfg     Config
	log     *slog.Logger
	m       *metrics
	db      *store.DB
	w       *writer
	hub     *hub
	devices registry

	defaultMu      sync.RWMutex
	defaultProfile *alarms.Profile
	ahead          aheadProfiles // per-device profiles of devices not seen yet (shared.go)
	labels         opLabels      // the operator's device labels (labels.go)
	calGen         atomic.Uint64 // counts Recalibrate calls (shared.go)

	failed atomic.Pointer[error] // the last batch failed to commit (nil = it committed)
}

// New builds the pipeline over an open store: it loads devices, cursors,
// profiles and alarm states so that nothing is announced twice after a
// restart.
func New(cfg Config) (*Pipeline, error) {
	p := &Pipeline{cfg: cfg, log: cfg.Log, db: cfg.Store, devices: registry{m: map[string]*device{}},
		defaultProfile: cfg.DefaultProfile}
	m, err := newMetrics(cfg.Registerer, func() float64 { return float64(cfg.Store.Size()) })
	if err != nil {
		return nil, fmt.Errorf("metrics: %w", err)
	}
	p.m = m
	p.hub = newHub(m)
	p.w = newWriter(cfg.Store, cfg.BatchDelay, cfg.BatchRecords, m, cfg.Now, p.storeFailed, p.storeWorks)
	if err := p.load(); err != nil {
		return nil, err
	}
	return p, nil
}

func (p *Pipeline) nowMS() int64 { return p.cfg.Now().UnixMilli() }

// load restores devices, cursors, profiles and alarm engines from the store.
func (p *Pipeline) load() error {
	descs, err := p.db.Devices()
	if err != nil {
		return fmt.Errorf("load devices: %w", err)
	}
	curs, err := p.db.Cursors()
	if err != nil {
		return fmt.Errorf("load cursors: %w", err)
	}
	profs, err := p.db.Profiles()
	if err != nil {
		return fmt.Errorf("load profiles: %w", err)
	}
	if b, ok := profs[""]; ok {
		prof, err := alarms.ParseProfile(b)
		if err != nil {
			return fmt.Errorf("stored default profile: %w", err)
		}
		p.defaultProfile = prof
	}
	states, err := p.db.AlarmStates()
	if err != nil {
		return fmt.Errorf("load alarm states: %w", err)
	}
	if p.labels.m, err = p.db.DeviceLabels(); err != nil {
		return fmt.Errorf("load device labels: %w", err)
	}
	known := make(map[string]bool, len(descs))
	for _, desc := range descs {
		known[desc.ID] = true
	}
	for id, b := range profs {
		if id != "" && !known[id] { // set for a device not seen yet: in force from its first connection
			prof, err := alarms.ParseProfile(b)
			if err != nil {
				return fmt.Errorf("stored profile of %s: %w", id, err)
			}
			p.ahead.put(id, prof)
		}
	}
	for _, desc := range descs {
		d, _ := p.devices.getOrCreate(desc.ID)
		d.desc = desc
		d.introLabels = p.labels.introduced(desc.ID, desc.Labels)
		if c, ok := curs[desc.ID]; ok {
			d.cur = c
			d.durableSeq = c.LastSeq
		}
		if b, ok := profs[desc.ID]; ok {
			prof, err := alarms.ParseProfile(b)
			if err != nil {
				return fmt.Errorf("stored profile of %s: %w", desc.ID, err)
			}
			d.profile, d.ownProfile = prof, true
		}
		if b, ok := states[desc.ID]; ok {
			if err := p.restoreEngine(d, b); err != nil {
				return err
			}
		}
		if d.restoreClock(p.nowMS()) {
			p.log.Warn("alarm state carried a time ahead of the gateway clock; evaluation rewound to now", "device", desc.ID)
		}
		p.refreshActive(d)
	}
	return nil
}

// restoreEngine gives a device loaded from the store the alarm engine of
// its stored state (a JSON alarms.State, see internal/store/doc.go). A state
// that does not fit the profile is logged and the engine starts fresh.
func (p *Pipeline) restoreEngine(d *device, state []byte) error {
	var st alarms.State
	if err := json.Unmarshal(state, &st); err != nil {
		return fmt.Errorf("alarm state of %s: %w", d.id, err)
	}
	prof := d.profile
	if prof == nil {
		prof = p.defaultProfile
	}
	if prof == nil {
		return nil
	}
	e, err := alarms.Restore(prof, st)
	if err != nil {
		p.log.Warn("alarm state not restored; starting fresh", "device", d.id, "err", err)
		return nil
	}
	d.engine, d.profile, d.alarmRev = e, prof, e.Revision()
	return nil
}

// ensureEngine gives a device an alarm engine for its profile. Caller holds d.mu.
func (p *Pipeline) ensureEngine(d *device) {
	if d.engine != nil {
		return
	}
	prof := p.profileFor(d)
	if prof == nil {
		return
	}
	e, err := alarms.NewEngine(prof, d.id)
	if err != nil {
		p.log.Error("alarm engine", "device", d.id, "err", err)
		return
	}
	d.engine, d.profile = e, prof
}

// storeFailed is called by the writer when a batch did not commit: nothing
// in it was acknowledged. The pipeline reports the failure (StoreFailure)
// until a write commits again. Each device with data in the batch enters a
// new write epoch: what it sent after the failed range and is still queued
// is not written nor acknowledged (writer.go), its cursor goes back to the
// last durable message, and its stream ends with a *StoreFault, so the
// device backs off and resends from the resume point of its next welcome.
// Streams of other devices go on. Runs in the writer goroutine, before the
// writer takes any later record.
func (p *Pipeline) storeFailed(err error, devs map[*device]bool) {
	p.log.Error("store write failed; ending the streams of the devices in the batch", "err", err, "devices", len(devs))
	p.failed.Store(&err)
	for d := range devs {
		d.mu.Lock()
		d.epoch.Add(1)
		d.rewindToDurable()
		s := d.stream
		resume := d.durableSeq
		d.mu.Unlock()
		if s != nil {
			s.cancel(&StoreFault{Err: err, Resume: resume})
		}
	}
}

// storeWorks is called by the writer after a batch committed.
func (p *Pipeline) storeWorks() {
	if p.failed.Load() != nil {
		p.failed.Store(nil)
		p.log.Info("store writes succeed again")
	}
}

// StoreFailure returns the error of the last batch when it failed to
// commit, nil when it committed (readiness).
func (p *Pipeline) StoreFailure() error {
	if e := p.failed.Load(); e != nil {
		return *e
	}
	return nil
}

// ProbeStore, while the last batch failed, tries a small write, so that
// readiness comes back when writes do even if no device writes (a load
// balancer sends none to an unready gateway).
func (p *Pipeline) ProbeStore() {
	if p.failed.Load() == nil {
		return
	}
	if err := p.db.Probe(p.cfg.Now()); err == nil {
		p.storeWorks()
	}
}

// RunWriter commits batches until CloseWriter; the caller runs it in a
// goroutine it owns.
func (p *Pipeline) RunWriter() { p.w.run() }

// Flush waits until everything accepted so far is durable.
func (p *Pipeline) Flush(ctx context.Context) error { return p.w.sync(ctx, nil) }

// CloseWriter stops accepting records; RunWriter commits what is queued
// and returns. Call it after every stream has ended.
func (p *Pipeline) CloseWriter() { p.w.close() }

// EndStreams asks every open stream to end, with cause.
func (p *Pipeline) EndStreams(cause error) {
	for _, d := range p.devices.all() {
		d.mu.Lock()
		if s := d.stream; s != nil {
			s.cancel(cause)
		}
		d.mu.Unlock()
	}
}

// Tick lets time pass for the alarm engines of devices without a stream,
// so device_offline (and signal_lost) can be announced, and persists
// changes; it ends streams whose device has not read its answers for
// Config.SendStall. The gateway's watchdog calls it every second.
func (p *Pipeline) Tick(ctx context.Context) {
	nowMS := p.nowMS()
	for _, d := range p.devices.all() {
		if s := d.streamNow(); s != nil {
			s.checkStall()
		} else if p.cfg.Fence != nil && p.cfg.Owner(d.id) != "" {
			continue // streams at its owner, whose engine evaluates it
		}
		d.mu.Lock()
		// Streams move their own engines, but a device whose every
		// message is refused for its clock still needs time to pass
		// for device_clock_fault to be announced.
		if d.engine == nil || d.stream != nil && !d.engine.ClockFault() {
			d.mu.Unlock()
			continue
		}
		var evs []alarms.Event
		d.engine.Tick(d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
		rec := &record{dev: d}
		p.alarmEffects(d, evs, rec)
		d.mu.Unlock()
		if rec.alarm != nil || len(rec.episodes) > 0 {
			_ = p.w.submit(ctx, rec)
		}
	}
}

// Audit queues an audit entry for the writer (it commits with the next
// batch; an entry that cannot be queued is logged).
func (p *Pipeline) Audit(ctx context.Context, actor, action, device, detail, remote string) {
	e := &store.AuditEntry{TimeMS: p.nowMS(), Actor: actor, Action: action, Device: device, Detail: detail, Remote: remote}
	if err := p.w.submit(context.WithoutCancel(ctx), &record{audit: []*store.AuditEntry{e}}); err != nil {
		p.log.Warn("audit entry not stored", "action", action, "err", err)
	}
}
