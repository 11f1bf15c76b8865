package ingest

import (
	"fmt"
	"math"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Effects of alarm-engine events: stored episodes and snapshots, audit
// entries for operator actions, metrics, and live events.

// alarmEffects turns engine events into stored episodes, metrics and live
// events, and attaches a new snapshot to rec when the state changed.
// Caller holds d.mu.
func (p *Pipeline) alarmEffects(d *device, evs []alarms.Event, rec *record) {
	for i := range evs {
		e := &evs[i]
		switch e.Type {
		case alarms.EventOnset:
			continue // logged once it is announced or withdrawn
		case alarms.EventAnnounced, alarms.EventEscalated:
			p.m.announcements.WithLabelValues(e.Episode.Condition, e.Episode.Priority.String()).Inc()
		}
		p.m.episodeEvents.WithLabelValues(e.Type.String()).Inc()
		var ep *store.Episode
		if e.Type != alarms.EventPaused && e.Type != alarms.EventResumed {
			ep = p.storeEpisode(d, &e.Episode)
			rec.episodes = append(rec.episodes, ep)
		}
		if e.Type == alarms.EventPaused || e.Type == alarms.EventResumed || e.Type == alarms.EventAcknowledged {
			who := e.Who
			if who == "" {
				who = "system"
			}
			rec.audit = append(rec.audit, &store.AuditEntry{TimeMS: p.nowMS(), Actor: who, Action: "alarm." + e.Type.String(), Device: d.id,
				Detail: episodeDetail(e)})
		}
		if p.hub.hasWatchers() {
			ev := &pb.EpisodeEvent{Transition: e.Type.String(), Actor: e.Who}
			if ep != nil {
				ev.Episode = EpisodeProto(ep)
			} else {
				ev.Episode = &pb.Episode{DeviceId: d.id}
			}
			p.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_EpisodeEvent{EpisodeEvent: ev}})
		}
	}
	if len(evs) > 0 {
		p.refreshActive(d)
	}
	if snap := d.alarmSnapshot(); snap != nil {
		rec.dev = d
		rec.alarm = snap
		if p.cfg.Alarms != nil {
			p.cfg.Alarms.PublishAlarm(d.id, snap) // fleet on etcd: fence.go
		}
	}
}

func episodeDetail(e *alarms.Event) string {
	switch e.Type {
	case alarms.EventPaused:
		return fmt.Sprintf("paused until %s", time.UnixMilli(int64(e.Until*1000)).UTC().Format(time.RFC3339))
	case alarms.EventResumed:
		return "pause ended"
	}
	return fmt.Sprintf("%s episode %d (%s)", e.Episode.Condition, e.Episode.ID, e.Episode.Priority)
}

// storeEpisode maps an engine episode to its stored form; the stored id
// combines the device's store index and the engine's per-device id.
func (p *Pipeline) storeEpisode(d *device, e *alarms.Episode) *store.Episode {
	ms := func(s float64) int64 {
		if math.IsNaN(s) {
			return 0
		}
		return int64(math.Round(s * 1000))
	}
	min := e.MinSpO2
	if math.IsNaN(min) {
		min = -1
	}
	prof := ""
	if d.profile != nil {
		prof = d.profile.Name
	}
	limit := e.Limit // NaN for conditions without one (signal_lost, device_offline); JSON has no NaN
	if math.IsNaN(limit) || math.IsInf(limit, 0) {
		limit = 0
	}
	return &store.Episode{
		ID: uint64(d.desc.Index)<<32 | (e.ID & 0xffffffff), Device: d.id, Condition: e.Condition, Priority: e.Priority.String(),
		OnsetMS: ms(e.OnsetS), AnnouncedMS: ms(e.AnnouncedS), EscalatedMS: ms(e.EscalatedS), EndedMS: ms(e.EndedS),
		MinSpO2: min, Limit: limit, DeficitPctS: e.DeficitPctS, AckedBy: e.AckedBy, AckedMS: ms(e.AckedS),
		Active: e.Announced() && (e.Phase == alarms.Active || e.Phase == alarms.Latched), Profile: prof,
	}
}

// refreshActive recomputes the device's contribution to the active-alarm
// gauge from its engine. Caller holds d.mu.
func (p *Pipeline) refreshActive(d *device) {
	now := map[[2]string]float64{}
	if d.engine != nil && d.desc.MovedTo == "" { // moved: active at the gateway it streams to
		for _, e := range d.engine.Episodes(nil) {
			if e.Announced() && (e.Phase == alarms.Active || e.Phase == alarms.Latched) {
				now[[2]string{e.Condition, e.Priority.String()}]++
			}
		}
	}
	for k, v := range d.activeGauge {
		if now[k] != v {
			p.m.alarmsActive.WithLabelValues(k[0], k[1]).Sub(v)
		}
	}
	for k, v := range now {
		if d.activeGauge[k] != v {
			p.m.alarmsActive.WithLabelValues(k[0], k[1]).Add(v)
		}
	}
	d.activeGauge = now
}

// publishDevice sends a connection change to watchers.
func (p *Pipeline) publishDevice(d *device, change string) {
	if !p.hub.hasWatchers() {
		return
	}
	d.mu.Lock()
	pd := d.toProto()
	d.mu.Unlock()
	p.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_DeviceChange{DeviceChange: &pb.DeviceChange{Device: pd, Change: change}}})
}
