package ingest

import (
	"fmt"
	"math"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// What FleetService and the web page read of the live devices.

// lookup returns the device, or an *Error of Kind NotFound.
func (p *Pipeline) lookup(id string) (*device, error) {
	d := p.devices.get(id)
	if d == nil {
		return nil, errorf(NotFound, "device_id: %q is not known to this gateway", id)
	}
	return d, nil
}

// Devices describes every known device, sorted by id.
func (p *Pipeline) Devices() []*pb.Device {
	var out []*pb.Device
	for _, d := range p.devices.all() {
		d.mu.Lock()
		out = append(out, d.toProto())
		d.mu.Unlock()
	}
	return out
}

// Device describes one device (an *Error of Kind NotFound when unknown).
func (p *Pipeline) Device(id string) (*pb.Device, error) {
	d, err := p.lookup(id)
	if err != nil {
		return nil, err
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.toProto(), nil
}

// Watch subscribes to live events (trend points only when points is set)
// of the given devices (all when none), with room for buffer events; a
// watcher that falls behind loses events rather than slowing ingest. The
// caller calls the returned function when it stops watching.
func (p *Pipeline) Watch(devices []string, points bool, buffer int) (<-chan *pb.WatchEventsResponse, func()) {
	sub := p.hub.subscribe(devices, points, buffer)
	return sub.ch, func() { p.hub.unsubscribe(sub) }
}

// AnnouncedEpisodes returns the announced, open episodes of the given
// devices (all when none), device by device.
func (p *Pipeline) AnnouncedEpisodes(devices []string) []*pb.Episode {
	want := map[string]bool{}
	for _, id := range devices {
		want[id] = true
	}
	var out []*pb.Episode
	for _, d := range p.devices.all() {
		if len(want) > 0 && !want[d.id] {
			continue
		}
		d.mu.Lock()
		var open []alarms.Episode
		if d.engine != nil && d.desc.MovedTo == "" { // moved: listed by ListEpisodes with where it went
			open = d.engine.Episodes(nil)
		}
		for i := range open {
			if open[i].Announced() {
				out = append(out, EpisodeProto(p.storeEpisode(d, &open[i])))
			}
		}
		d.mu.Unlock()
	}
	return out
}

// Qualities returns the quality figures of every known device.
func (p *Pipeline) Qualities() ([]*pb.DeviceQuality, error) {
	var out []*pb.DeviceQuality
	for _, d := range p.devices.all() {
		q, err := p.quality(d)
		if err != nil {
			return nil, err
		}
		out = append(out, q)
	}
	return out, nil
}

// Quality returns a device's quality figures (an *Error of Kind NotFound
// when unknown).
func (p *Pipeline) Quality(id string) (*pb.DeviceQuality, error) {
	d, err := p.lookup(id)
	if err != nil {
		return nil, err
	}
	return p.quality(d)
}

// quality assembles a device's quality figures: counters from its
// cursor (persisted), distributions, shares, drift and rate from memory
// (since the gateway started; see quality.go), uptime from its stored
// sessions and the open one.
func (p *Pipeline) quality(d *device) (*pb.DeviceQuality, error) {
	nowMS := p.nowMS()
	const week = 7 * 24 * time.Hour
	// Sessions that started inside the 7-day window, plus a day before it for
	// sessions that started earlier and ended inside it. An open session is
	// taken from memory, however long ago it started.
	sessions, err := p.db.SessionsSince(d.id, nowMS-week.Milliseconds())
	if err != nil {
		return nil, fmt.Errorf("sessions of %s: %w", d.id, err)
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	q := &pb.DeviceQuality{
		DeviceId: d.id, Sessions: d.desc.Sessions,
		ChunksLost: d.cur.Lost, Duplicates: d.cur.Duplicates, LateChunks: d.cur.Late,
		ChunksAccepted: d.cur.Chunks, ChunksRejected: d.cur.Rejected, BatteryPct: d.desc.BatteryPct,
	}
	if d.desc.Sessions > 0 {
		q.Reconnects = d.desc.Sessions - 1
	}
	if v := d.q.driftPPM(); !math.IsNaN(v) {
		q.ClockDriftPpm = &v
	} else if v := d.desc.DriftPPM; v != 0 {
		q.ClockDriftPpm = &v // the last estimate stored, until memory has one
	}
	if v := d.q.effectiveRateHz(); !math.IsNaN(v) {
		q.EffectiveSampleRateHz = &v
	}
	if d.q.seconds > 0 {
		n := float64(d.q.seconds)
		q.ValidSpo2Share = float64(d.q.validSpO2) / n
		q.ClippingShare = float64(d.q.clipping) / n
		q.LowResolutionShare = float64(d.q.lowRes) / n
	}
	if n, pos := d.q.sqi.quantiles(); n > 0 {
		q.Sqi = &pb.Distribution{Count: n, P10: sqiValue(pos[0]), P50: sqiValue(pos[1]), P90: sqiValue(pos[2])}
	}
	if n, pos := d.q.pi.quantiles(); n > 0 {
		q.PiPct = &pb.Distribution{Count: n, P10: piValue(pos[0]), P50: piValue(pos[1]), P90: piValue(pos[2])}
	}
	// The device's on-stretches: stored sessions and the open one. A
	// session never closed (the gateway stopped without closing it) counts
	// as down.
	open := d.stream != nil
	var on []span
	seenOpen := false
	for _, s := range sessions {
		end := s.EndMS
		if end == 0 {
			if !open || s.StartMS != d.sessionMS {
				continue
			}
			end, seenOpen = nowMS, true
		}
		on = append(on, span{s.StartMS, end})
	}
	if open && !seenOpen && d.sessionMS < nowMS {
		on = append(on, span{d.sessionMS, nowMS}) // the open session started before the sessions read
	}
	up := func(window time.Duration) (float64, float64) {
		share, covered := uptimeShare(on, d.desc.FirstSeenMS, nowMS, window)
		if !covered {
			return 0, 0
		}
		return share, float64(uptimeWindowMS(d.desc.FirstSeenMS, nowMS, window)) / 1000
	}
	q.Uptime_1H, q.Uptime_1HWindowS = up(time.Hour)
	q.Uptime_24H, q.Uptime_24HWindowS = up(24 * time.Hour)
	q.Uptime_7D, q.Uptime_7DWindowS = up(week)
	return q, nil
}
