package gateway

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// maxTrendPoints bounds a raw (step 0) trend answer.
const maxTrendPoints = 100_000

func (g *Gateway) device(id string) (*device, error) {
	if err := validID("device_id", id); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	d := g.devices.get(id)
	if d == nil {
		return nil, status.Errorf(codes.NotFound, "device_id: %q is not known to this gateway", id)
	}
	return d, nil
}

// ListDevices implements FleetService.
func (g *Gateway) ListDevices(ctx context.Context, _ *pb.ListDevicesRequest) (*pb.ListDevicesResponse, error) {
	out := &pb.ListDevicesResponse{}
	for _, d := range g.devices.all() {
		d.mu.Lock()
		out.Devices = append(out.Devices, d.toProto())
		d.mu.Unlock()
	}
	return out, nil
}

// GetDevice implements FleetService.
func (g *Gateway) GetDevice(ctx context.Context, req *pb.GetDeviceRequest) (*pb.GetDeviceResponse, error) {
	d, err := g.device(req.GetDeviceId())
	if err != nil {
		return nil, err
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	return &pb.GetDeviceResponse{Device: d.toProto()}, nil
}

// QueryTrend implements FleetService.
func (g *Gateway) QueryTrend(ctx context.Context, req *pb.QueryTrendRequest) (*pb.QueryTrendResponse, error) {
	if err := validID("device_id", req.GetDeviceId()); err != nil {
		return nil, status.Error(codes.InvalidArgument, err.Error())
	}
	from, to := req.GetFromUnixMs(), req.GetToUnixMs()
	if to <= from {
		return nil, status.Errorf(codes.InvalidArgument, "to_unix_ms: %d, want after from_unix_ms (%d)", to, from)
	}
	if req.GetStepMs() < 0 {
		return nil, status.Errorf(codes.InvalidArgument, "step_ms: %d, want >= 0", req.GetStepMs())
	}
	out := &pb.QueryTrendResponse{}
	if req.GetStepMs() == 0 {
		err := g.db.Trend(req.GetDeviceId(), from, to, func(p store.Point) bool {
			if len(out.Points) >= maxTrendPoints {
				out.Truncated = true
				return false
			}
			out.Points = append(out.Points, pointProto(&p))
			return true
		})
		if err != nil {
			return nil, status.Errorf(codes.Internal, "%v", err)
		}
		return out, nil
	}
	bs, err := g.db.TrendBuckets(req.GetDeviceId(), from, to, req.GetStepMs())
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	for _, b := range bs {
		out.Buckets = append(out.Buckets, &pb.TrendBucket{StartUnixMs: b.StartMS, Points: b.Points,
			Spo2Pct: statProto(b.SpO2), PulseBpm: statProto(b.Pulse), PiPct: statProto(b.PI), Sqi: statProto(b.SQI)})
	}
	return out, nil
}

func statProto(s store.Stat) *pb.Stat {
	if s.Count == 0 {
		return &pb.Stat{}
	}
	return &pb.Stat{Count: s.Count, Min: s.Min, Mean: s.Mean, Max: s.Max}
}

// WatchEvents implements FleetService.
func (g *Gateway) WatchEvents(req *pb.WatchEventsRequest, ws pb.FleetService_WatchEventsServer) error {
	sub := g.hub.subscribe(req.GetDeviceIds(), req.GetTrendPoints(), 1024)
	defer g.hub.unsubscribe(sub)
	for {
		select {
		case <-ws.Context().Done():
			return nil
		case ev := <-sub.ch:
			if err := ws.Send(ev); err != nil {
				return err
			}
		}
	}
}

// ListEpisodes implements FleetService.
func (g *Gateway) ListEpisodes(ctx context.Context, req *pb.ListEpisodesRequest) (*pb.ListEpisodesResponse, error) {
	limit := int(req.GetLimit())
	if limit == 0 {
		limit = 1000
	}
	if limit > 10000 {
		return nil, status.Errorf(codes.InvalidArgument, "limit: %d, want 1..10000 (0 = 1000)", limit)
	}
	eps, err := g.db.Episodes(store.EpisodeFilter{Device: req.GetDeviceId(), FromMS: req.GetFromUnixMs(), ToMS: req.GetToUnixMs(),
		ActiveOnly: req.GetActiveOnly(), Limit: limit})
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	out := &pb.ListEpisodesResponse{}
	for i := range eps {
		out.Episodes = append(out.Episodes, episodeProto(&eps[i]))
	}
	return out, nil
}

// WatchEpisodes implements FleetService: the active episodes first, then
// every transition.
func (g *Gateway) WatchEpisodes(req *pb.WatchEpisodesRequest, ws pb.FleetService_WatchEpisodesServer) error {
	sub := g.hub.subscribe(req.GetDeviceIds(), false, 1024)
	defer g.hub.unsubscribe(sub)
	want := map[string]bool{}
	for _, id := range req.GetDeviceIds() {
		want[id] = true
	}
	for _, d := range g.devices.all() {
		if len(want) > 0 && !want[d.id] {
			continue
		}
		d.mu.Lock()
		var open []alarms.Episode
		if d.engine != nil {
			open = d.engine.Episodes(nil)
		}
		var evs []*pb.EpisodeEvent
		for i := range open {
			if open[i].Announced() {
				evs = append(evs, &pb.EpisodeEvent{Transition: "active", Episode: episodeProto(g.storeEpisode(d, &open[i]))})
			}
		}
		d.mu.Unlock()
		for _, ev := range evs {
			if err := ws.Send(&pb.WatchEpisodesResponse{Event: ev}); err != nil {
				return err
			}
		}
	}
	for {
		select {
		case <-ws.Context().Done():
			return nil
		case ev := <-sub.ch:
			if ee := ev.GetEpisodeEvent(); ee != nil {
				if err := ws.Send(&pb.WatchEpisodesResponse{Event: ee}); err != nil {
					return err
				}
			}
		}
	}
}

// operatorAction runs fn on a device's alarm engine under its lock, then
// makes the effects durable before answering.
// why (the note of an acknowledgement, the reason of a pause) is added to
// the audit entries, which also name the caller's address.
func (g *Gateway) operatorAction(ctx context.Context, id, why string, fn func(d *device, t float64, emit func(alarms.Event)) error) ([]alarms.Event, error) {
	d, err := g.device(id)
	if err != nil {
		return nil, err
	}
	d.mu.Lock()
	g.ensureEngine(d)
	if d.engine == nil {
		d.mu.Unlock()
		return nil, status.Errorf(codes.FailedPrecondition, "device_id: %q has no alarm profile", id)
	}
	t := math.Max(d.deviceTimeS(g.nowMS()), d.engine.LastT())
	var evs []alarms.Event
	if err := fn(d, t, func(e alarms.Event) { evs = append(evs, e) }); err != nil {
		d.mu.Unlock()
		return nil, err
	}
	rec := &record{dev: d}
	g.alarmEffects(d, evs, rec)
	d.mu.Unlock()
	for _, a := range rec.audit {
		a.Remote = auth.RemoteFrom(ctx)
		if why != "" {
			a.Detail += "; " + why
		}
	}
	if err := g.w.sync(ctx, rec); err != nil {
		return nil, status.Errorf(codes.Unavailable, "store: %v", err)
	}
	return evs, nil
}

// AcknowledgeAlarm implements FleetService.
func (g *Gateway) AcknowledgeAlarm(ctx context.Context, req *pb.AcknowledgeAlarmRequest) (*pb.AcknowledgeAlarmResponse, error) {
	if n := len(req.GetNote()); n > 500 {
		return nil, status.Errorf(codes.InvalidArgument, "note: %d characters, want at most 500", n)
	}
	who := auth.ActorFrom(ctx)
	note := ""
	if req.GetNote() != "" {
		note = "note: " + req.GetNote()
	}
	evs, err := g.operatorAction(ctx, req.GetDeviceId(), note, func(d *device, t float64, emit func(alarms.Event)) error {
		d.engine.Acknowledge(who, t, emit)
		return nil
	})
	if err != nil {
		return nil, err
	}
	out := &pb.AcknowledgeAlarmResponse{}
	d := g.devices.get(req.GetDeviceId())
	for i := range evs {
		if evs[i].Type == alarms.EventAcknowledged {
			d.mu.Lock()
			ep := g.storeEpisode(d, &evs[i].Episode)
			d.mu.Unlock()
			if req.GetEpisodeId() == 0 || req.GetEpisodeId() == ep.ID {
				out.Episodes = append(out.Episodes, episodeProto(ep))
			}
		}
	}
	if len(out.Episodes) == 0 {
		return nil, status.Errorf(codes.FailedPrecondition, "device_id: %q has no announced, unacknowledged alarm", req.GetDeviceId())
	}
	return out, nil
}

// PauseAlarms implements FleetService.
func (g *Gateway) PauseAlarms(ctx context.Context, req *pb.PauseAlarmsRequest) (*pb.PauseAlarmsResponse, error) {
	if n := len(req.GetReason()); n > 500 {
		return nil, status.Errorf(codes.InvalidArgument, "reason: %d characters, want at most 500", n)
	}
	who := auth.ActorFrom(ctx)
	var until float64
	reason := ""
	if req.GetReason() != "" {
		reason = "reason: " + req.GetReason()
	}
	_, err := g.operatorAction(ctx, req.GetDeviceId(), reason, func(d *device, t float64, emit func(alarms.Event)) error {
		if req.GetDurationS() == 0 {
			d.engine.Resume(who, t, emit)
			return nil
		}
		until = t + float64(req.GetDurationS())
		if err := d.engine.Pause(who, t, until, emit); err != nil {
			return status.Errorf(codes.InvalidArgument, "duration_s: %v", err)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	return &pb.PauseAlarmsResponse{PausedUntilUnixMs: int64(until * 1000)}, nil
}

// GetAlarmProfile implements FleetService.
func (g *Gateway) GetAlarmProfile(ctx context.Context, req *pb.GetAlarmProfileRequest) (*pb.GetAlarmProfileResponse, error) {
	var p *alarms.Profile
	origin := "default"
	if req.GetDeviceId() != "" {
		d, err := g.device(req.GetDeviceId())
		if err != nil {
			return nil, err
		}
		d.mu.Lock()
		if d.ownProfile {
			p, origin = d.profile, "device"
		}
		d.mu.Unlock()
	}
	if p == nil {
		g.defaultMu.RLock()
		p = g.defaultProfile
		g.defaultMu.RUnlock()
	}
	if p == nil {
		return nil, status.Errorf(codes.NotFound, "no alarm profile is configured")
	}
	b, err := p.Marshal()
	if err != nil {
		return nil, status.Errorf(codes.Internal, "%v", err)
	}
	return &pb.GetAlarmProfileResponse{ProfileYaml: string(b), Name: p.Name, Origin: origin}, nil
}

// SetAlarmProfile implements FleetService. The new profile applies from the
// next sample; open episodes carry over (see alarms.Engine.SetProfile).
func (g *Gateway) SetAlarmProfile(ctx context.Context, req *pb.SetAlarmProfileRequest) (*pb.SetAlarmProfileResponse, error) {
	if n := len(req.GetProfileYaml()); n == 0 || n > 64<<10 {
		return nil, status.Errorf(codes.InvalidArgument, "profile_yaml: %d bytes, want 1..65536", n)
	}
	if n := len(req.GetReason()); n > 500 {
		return nil, status.Errorf(codes.InvalidArgument, "reason: %d characters, want at most 500", n)
	}
	text := []byte(req.GetProfileYaml())
	if name := strings.TrimSpace(req.GetProfileYaml()); slices.Contains(profiles.Names(), name) {
		// A built-in profile by name: the full YAML is applied and stored,
		// so a restart or a later build with other defaults keeps it.
		b, err := profiles.Bytes(name)
		if err != nil {
			return nil, status.Errorf(codes.Internal, "profile_yaml: %v", err)
		}
		text = b
	}
	p, err := alarms.ParseProfile(text)
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "profile_yaml: %v (or a built-in profile name: %s)", err, strings.Join(profiles.Names(), ", "))
	}
	who := auth.ActorFrom(ctx)
	audit := &store.AuditEntry{TimeMS: g.nowMS(), Actor: who, Action: "profile.set", Device: req.GetDeviceId(),
		Detail: fmt.Sprintf("profile %s; reason: %s", p.Name, req.GetReason()), Remote: auth.RemoteFrom(ctx)}
	targets := g.devices.all()
	if req.GetDeviceId() != "" {
		d, err := g.device(req.GetDeviceId())
		if err != nil {
			return nil, err
		}
		targets = []*device{d}
	}
	if err := g.db.SetProfile(req.GetDeviceId(), text, audit); err != nil {
		return nil, status.Errorf(codes.Unavailable, "store: %v", err)
	}
	if req.GetDeviceId() == "" {
		g.defaultMu.Lock()
		g.defaultProfile = p
		g.defaultMu.Unlock()
	}
	for _, d := range targets {
		d.mu.Lock()
		if req.GetDeviceId() == "" && d.ownProfile {
			d.mu.Unlock()
			continue
		}
		var evs []alarms.Event
		if d.engine != nil {
			t := math.Max(d.deviceTimeS(g.nowMS()), d.engine.LastT())
			if err := d.engine.SetProfile(p, t, func(e alarms.Event) { evs = append(evs, e) }); err != nil {
				d.mu.Unlock()
				return nil, status.Errorf(codes.FailedPrecondition, "device %s: %v", d.id, err)
			}
		}
		d.profile = p
		d.ownProfile = req.GetDeviceId() != ""
		rec := &record{dev: d}
		g.alarmEffects(d, evs, rec)
		d.mu.Unlock()
		if err := g.w.sync(ctx, rec); err != nil && !errors.Is(err, errWriterClosed) {
			return nil, status.Errorf(codes.Unavailable, "store: %v", err)
		}
	}
	return &pb.SetAlarmProfileResponse{Name: p.Name}, nil
}

// GetDeviceQuality implements FleetService.
func (g *Gateway) GetDeviceQuality(ctx context.Context, req *pb.GetDeviceQualityRequest) (*pb.GetDeviceQualityResponse, error) {
	d, err := g.device(req.GetDeviceId())
	if err != nil {
		return nil, err
	}
	q, err := g.deviceQuality(d)
	if err != nil {
		return nil, err
	}
	return &pb.GetDeviceQualityResponse{Quality: q}, nil
}

// ListDeviceQuality implements FleetService.
func (g *Gateway) ListDeviceQuality(ctx context.Context, _ *pb.ListDeviceQualityRequest) (*pb.ListDeviceQualityResponse, error) {
	out := &pb.ListDeviceQualityResponse{}
	for _, d := range g.devices.all() {
		q, err := g.deviceQuality(d)
		if err != nil {
			return nil, err
		}
		out.Qualities = append(out.Qualities, q)
	}
	return out, nil
}

// deviceQuality assembles a device's quality figures: counters from its
// cursor (persisted), distributions, shares, drift and rate from memory
// (since the gateway started; see quality.go), uptime from its stored
// sessions and the open one.
func (g *Gateway) deviceQuality(d *device) (*pb.DeviceQuality, error) {
	nowMS := g.nowMS()
	const week = 7 * 24 * time.Hour
	// Sessions that started inside the 7-day window, plus a day before it for
	// sessions that started earlier and ended inside it. An open session is
	// taken from memory, however long ago it started.
	sessions, err := g.db.SessionsSince(d.id, nowMS-week.Milliseconds())
	if err != nil {
		return nil, status.Errorf(codes.Internal, "sessions of %s: %v", d.id, err)
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
