package ingest

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Fence takes a device's fence before its stream is accepted, in a fleet
// of gateways (internal/cluster over etcd). lost is called when the fence
// is taken away (the device now belongs to another gateway, or this
// gateway's membership lapsed) and the stream must end; release gives the
// fence back when the stream ended. An error that has a RedirectTo() string
// method names the device's owner: the device is redirected there.
type Fence func(ctx context.Context, deviceID string, lost func(error)) (release func(), err error)

// MovedAway is the cause of a stream ended because its device's fence was
// taken away.
type MovedAway struct{ Err error }

func (e *MovedAway) Error() string {
	return "device moved to another gateway of the fleet: " + e.Err.Error()
}
func (e *MovedAway) Unwrap() error { return e.Err }

type redirector interface{ RedirectTo() string }

// movedFlushTimeout bounds the flush of a stream whose device moves away.
const movedFlushTimeout = 10 * time.Second

// fence takes the device's fence for s when the pipeline has a Fence.
func (s *stream) fence(ctx context.Context) error {
	f := s.p.cfg.Fence
	if f == nil {
		return nil
	}
	id := s.dev.id
	// Losing the fence ends the stream; finish makes what it accepted
	// durable first, so its last acknowledgement goes out and the device
	// resends nothing the next gateway would store again. The device
	// reconnects here and is redirected to the new owner.
	rel, err := f(ctx, id, func(err error) { s.cancel(&MovedAway{Err: err}) })
	if err != nil {
		var r redirector
		if errors.As(err, &r) && r.RedirectTo() != "" {
			addr := r.RedirectTo()
			s.send(&pb.ConnectResponse{Kind: &pb.ConnectResponse_Redirect{Redirect: &pb.Redirect{Address: addr, Detail: "device " + id + " belongs to the gateway at " + addr}}})
			return errorf(Precondition, "device %s belongs to the gateway at %s", id, addr)
		}
		if c := context.Cause(ctx); c != nil {
			return c
		}
		return errorf(Unavailable, "%v", err)
	}
	s.release = rel
	return nil
}

// unfence releases the fence fence took, if any.
func (s *stream) unfence() {
	if s.release != nil {
		s.release()
		s.release = nil
	}
}

// movedAway reports whether the stream ends because its device's fence was
// taken away. Then finish flushes the writer first (so the final
// acknowledgement covers everything accepted) and does not put the device
// offline for its alarm engine: it streams on at another gateway.
func (s *stream) movedAway(ctx context.Context) bool {
	var m *MovedAway
	if !errors.As(context.Cause(ctx), &m) {
		return false
	}
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), movedFlushTimeout)
	defer cancel()
	if err := s.p.w.sync(sctx, nil); err != nil {
		s.p.log.Warn("device moving away: store flush", "device", s.dev.id, "err", err)
	}
	return true
}

// AlarmShare carries a device's alarm state between the gateways of a
// fleet (internal/cluster): PublishAlarm takes each new snapshot (it must
// not block), SharedAlarm returns the last one any gateway published.
type AlarmShare interface {
	PublishAlarm(deviceID string, state []byte)
	SharedAlarm(ctx context.Context, deviceID string) ([]byte, error)
}

// adoptSharedAlarm gives the device the alarm state the fleet last
// published for it when that is newer than the one this gateway holds (its
// last evaluated time is later), so an episode announced by the previous
// gateway goes on here without being announced again. Episode numbers go on
// above both, so no stored episode is overwritten. Runs after the fence is
// taken; without a share, or when etcd does not answer, the local state
// stays (and the device's alarms are evaluated from it).
func (s *stream) adoptSharedAlarm(ctx context.Context) {
	sh, p, d := s.p.cfg.Alarms, s.p, s.dev
	if sh == nil {
		return
	}
	b, err := sh.SharedAlarm(ctx, d.id)
	if err != nil || b == nil {
		if err != nil {
			p.log.Warn("shared alarm state not read; going on with this gateway's", "device", d.id, "err", err)
		}
		return
	}
	var st alarms.State
	if err := json.Unmarshal(b, &st); err != nil || st.LastS == nil {
		return
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	p.adoptState(d, st)
}

// adoptState gives d the engine of the shared state st unless d's own
// engine is as new (see adoptSharedAlarm); it reports whether it did.
// Caller holds d.mu.
func (p *Pipeline) adoptState(d *device, st alarms.State) bool {
	if d.engine != nil {
		local := d.engine.Snapshot()
		if st.LastS == nil || local.LastS != nil && *local.LastS >= *st.LastS {
			return false // this gateway's state is as new
		}
		st.NextID = max(st.NextID, local.NextID)
	}
	prof := p.profileFor(d)
	if prof == nil {
		return false
	}
	e, err := alarms.Restore(prof, st)
	if err != nil {
		p.log.Warn("shared alarm state does not fit this gateway's profile; not adopted", "device", d.id, "err", err)
		return false
	}
	d.engine, d.profile = e, prof
	d.alarmRev = 0 // stored here with the next batch of the device
	d.adopted = true
	p.refreshActive(d)
	p.log.Info("alarm state adopted from the fleet", "device", d.id, "episodes_next_id", st.NextID)
	return true
}

// AdoptSilent takes over the alarm engine of a device this gateway now
// owns but that streams to no gateway of the fleet (its gateway died and
// the device did not reconnect anywhere: battery flat, radio gone). state
// is the alarm snapshot the fleet last published for it. The engine is
// restored from it when it is newer than this gateway's own (episodes
// already announced are not announced again), and the device is put
// offline for it, so device_offline is announced here after its alarm
// condition delay (from the offline report the dead gateway published, or
// from now when the device was streaming when that gateway died) and
// shows on this gateway's fleet page, metrics and notifications. A device
// streaming here is left alone; one that connects later comes back online
// as after any disconnection. The gateway's watchdog calls it for the
// devices cluster.Node.SilentDevices lists after a membership change.
func (p *Pipeline) AdoptSilent(ctx context.Context, deviceID string, state []byte) error {
	var st alarms.State
	if err := json.Unmarshal(state, &st); err != nil {
		return fmt.Errorf("shared alarm state of %s: %w", deviceID, err)
	}
	d, created := p.devices.getOrCreate(deviceID)
	nowMS := p.nowMS()
	d.mu.Lock()
	if d.stream != nil {
		d.mu.Unlock()
		return nil
	}
	p.adoptState(d, st)
	p.ensureEngine(d)
	rec := &record{dev: d}
	rec.episodes = p.adoptedEpisodes(d)
	moved := p.backHere(d) // owned here now
	if created || moved {
		desc := d.desc
		rec.desc = &desc // listed after a restart too
	}
	var evs []alarms.Event
	if d.engine != nil && !d.engine.Offline() {
		d.engine.SetOffline(true, d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
	}
	p.alarmEffects(d, evs, rec)
	// A device new to this store has no index yet, which its adopted
	// episodes' stored ids need: wait for the description's write then.
	needIndex := d.adopted && d.desc.Index == 0 && rec.desc != nil
	d.mu.Unlock()
	if created || moved || len(evs) > 0 || rec.alarm != nil {
		write := p.w.submit
		if needIndex {
			write = p.w.sync
		}
		if err := write(context.WithoutCancel(ctx), rec); err != nil {
			return fmt.Errorf("adopting silent device %s: %w", deviceID, err)
		}
		p.publishDevice(d, "disconnected")
	}
	if needIndex {
		d.mu.Lock()
		if d.desc.Index == 0 {
			d.desc.Index = rec.desc.Index // assigned by the store on the device's first write
		}
		eps := p.adoptedEpisodes(d)
		d.mu.Unlock()
		if len(eps) > 0 {
			if err := p.w.submit(context.WithoutCancel(ctx), &record{episodes: eps}); err != nil {
				return fmt.Errorf("adopting silent device %s: its open episodes: %w", deviceID, err)
			}
		}
	}
	return nil
}

// adoptedEpisodes returns, once after the engine was adopted from the
// fleet, the stored form of its active, announced episodes, so they are
// stored here as they go on here: the store's outbox then has this
// gateway's notifier send them firing and resend them (internal/notify,
// under the same labels as the gateway that announced them, which stops
// resending them once the device moved away), and their end here resolves
// them. It returns nil before the device has its index in this store (a
// device new here: then with its next stream). Caller holds d.mu.
func (p *Pipeline) adoptedEpisodes(d *device) []*store.Episode {
	if !d.adopted || d.engine == nil || d.desc.Index == 0 {
		return nil
	}
	d.adopted = false
	var out []*store.Episode
	for _, e := range d.engine.Episodes(nil) {
		if e.Announced() && (e.Phase == alarms.Active || e.Phase == alarms.Latched) {
			out = append(out, p.storeEpisode(d, &e))
		}
	}
	return out
}

// movedTo returns the gateway a stream's device moved to, when the stream
// ends because its fence was taken away ("" otherwise).
func movedTo(ctx context.Context) string {
	var m *MovedAway
	if !errors.As(context.Cause(ctx), &m) {
		return ""
	}
	var r redirector
	if errors.As(m.Err, &r) && r.RedirectTo() != "" {
		return r.RedirectTo()
	}
	return UnknownGateway
}

// UnknownGateway is MovedTo of a device whose fence this gateway lost
// without learning where it went (its own membership lapsed).
const UnknownGateway = "another gateway of the fleet (this gateway's membership lapsed)"

// markMoved records that d moved to gateway to at nowMS (the description
// names the gateway; finish stores it). Its episodes open here are then
// neither active nor ended here: they go on there. They stay listed with
// where they went (ListEpisodes through MarkMoved, the device through
// toProto), the active-alarm gauge drops them, and watchers are told. An
// alarm tool never hides an alarm: the episodes are findable here and
// active where the device streams now. The stored episode records are not
// rewritten: a stored change of an announced episode would be notified
// (internal/notify) as if it had ended. Caller holds d.mu.
func (p *Pipeline) markMoved(d *device, to string, nowMS int64) {
	d.desc.MovedTo, d.desc.MovedMS = to, nowMS
	p.openChanged(d, "moved")
}

// openChanged refreshes the gauge for d's open episodes and tells watchers
// their new state. Caller holds d.mu.
func (p *Pipeline) openChanged(d *device, transition string) {
	p.refreshActive(d)
	if d.engine == nil || !p.hub.hasWatchers() {
		return
	}
	for _, e := range d.engine.Episodes(nil) {
		if e.Phase != alarms.Active && e.Phase != alarms.Latched || !e.Announced() {
			continue
		}
		ep := EpisodeProto(p.storeEpisode(d, &e))
		markMoved(ep, d.desc.MovedTo)
		p.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_EpisodeEvent{EpisodeEvent: &pb.EpisodeEvent{Transition: transition, Episode: ep}}})
	}
}

// backHere clears d's moved mark when the device streams here again (or
// is adopted here): its open episodes are active here again. It reports
// whether d was marked. Caller holds d.mu.
func (p *Pipeline) backHere(d *device) bool {
	if d.desc.MovedTo == "" {
		return false
	}
	d.desc.MovedTo, d.desc.MovedMS = "", 0
	p.openChanged(d, "active")
	return true
}

// MarkMoved marks a stored episode that is still open as moved when its
// device moved to another gateway of the fleet: not active here, with the
// gateway it goes on at. It reports whether it did.
func (p *Pipeline) MarkMoved(e *pb.Episode) bool {
	d := p.devices.get(e.GetDeviceId())
	if d == nil {
		return false
	}
	d.mu.Lock()
	to := d.desc.MovedTo
	d.mu.Unlock()
	return markMoved(e, to)
}

func markMoved(e *pb.Episode, to string) bool {
	if to == "" || !e.GetActive() || e.GetEndedUnixMs() != 0 {
		return false
	}
	e.Active, e.MovedToGateway = false, to
	return true
}
