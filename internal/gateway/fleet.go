package gateway

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"strings"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ids"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// maxTrendPoints bounds a raw (step 0) trend answer.
const maxTrendPoints = 100_000

// checkID checks a device id given to a FleetService method.
func checkID(id string) error {
	if err := validID("device_id", id); err != nil {
		return status.Error(codes.InvalidArgument, err.Error())
	}
	return nil
}

// validID checks an id: 1..64 of [A-Za-z0-9._-] (internal/ids).
func validID(field, id string) error { return ids.Check(field, id) }

// ListDevices implements FleetService.
func (g *Gateway) ListDevices(ctx context.Context, _ *pb.ListDevicesRequest) (*pb.ListDevicesResponse, error) {
	return &pb.ListDevicesResponse{Devices: g.ingest.Devices()}, nil
}

// GetDevice implements FleetService.
func (g *Gateway) GetDevice(ctx context.Context, req *pb.GetDeviceRequest) (*pb.GetDeviceResponse, error) {
	if err := checkID(req.GetDeviceId()); err != nil {
		return nil, err
	}
	d, err := g.ingest.Device(req.GetDeviceId())
	if err != nil {
		return nil, ingestStatus(err)
	}
	return &pb.GetDeviceResponse{Device: d}, nil
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
			out.Points = append(out.Points, ingest.TrendPointProto(&p))
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
	events, stop := g.ingest.Watch(req.GetDeviceIds(), req.GetTrendPoints(), 1024)
	defer stop()
	for {
		select {
		case <-ws.Context().Done():
			return nil
		case ev := <-events:
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
		e := ingest.EpisodeProto(&eps[i])
		if g.ingest.MarkMoved(e) && req.GetActiveOnly() {
			continue // active at the gateway its device moved to
		}
		out.Episodes = append(out.Episodes, e)
	}
	return out, nil
}

// WatchEpisodes implements FleetService: the active episodes first, then
// every transition.
func (g *Gateway) WatchEpisodes(req *pb.WatchEpisodesRequest, ws pb.FleetService_WatchEpisodesServer) error {
	events, stop := g.ingest.Watch(req.GetDeviceIds(), false, 1024)
	defer stop()
	for _, ep := range g.ingest.AnnouncedEpisodes(req.GetDeviceIds()) {
		if err := ws.Send(&pb.WatchEpisodesResponse{Event: &pb.EpisodeEvent{Transition: "active", Episode: ep}}); err != nil {
			return err
		}
	}
	for {
		select {
		case <-ws.Context().Done():
			return nil
		case ev := <-events:
			if ee := ev.GetEpisodeEvent(); ee != nil {
				if err := ws.Send(&pb.WatchEpisodesResponse{Event: ee}); err != nil {
					return err
				}
			}
		}
	}
}

// operatorAction runs fn on a device's alarm engine (ingest.AlarmAction),
// the effects durable before it answers. why (the note of an
// acknowledgement, the reason of a pause) is added to the audit entries,
// which also name the caller's address.
func (g *Gateway) operatorAction(ctx context.Context, id, why string, fn func(e *alarms.Engine, t float64, emit func(alarms.Event)) error) ([]alarms.Event, error) {
	if err := checkID(id); err != nil {
		return nil, err
	}
	evs, err := g.ingest.AlarmAction(ctx, id, why, auth.RemoteFrom(ctx), fn)
	return evs, ingestStatus(err)
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
	evs, err := g.operatorAction(ctx, req.GetDeviceId(), note, func(e *alarms.Engine, t float64, emit func(alarms.Event)) error {
		e.Acknowledge(who, t, emit)
		return nil
	})
	if err != nil {
		return nil, err
	}
	out := &pb.AcknowledgeAlarmResponse{}
	for i := range evs {
		if evs[i].Type == alarms.EventAcknowledged {
			ep := g.ingest.StoredEpisode(req.GetDeviceId(), &evs[i].Episode)
			if req.GetEpisodeId() == 0 || req.GetEpisodeId() == ep.ID {
				out.Episodes = append(out.Episodes, ingest.EpisodeProto(ep))
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
	_, err := g.operatorAction(ctx, req.GetDeviceId(), reason, func(e *alarms.Engine, t float64, emit func(alarms.Event)) error {
		if req.GetDurationS() == 0 {
			e.Resume(who, t, emit)
			return nil
		}
		until = t + float64(req.GetDurationS())
		if err := e.Pause(who, t, until, emit); err != nil {
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
	if req.GetDeviceId() != "" {
		if err := checkID(req.GetDeviceId()); err != nil {
			return nil, err
		}
	}
	p, origin, err := g.ingest.Profile(req.GetDeviceId())
	if err != nil {
		return nil, ingestStatus(err)
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
	if req.GetDeviceId() != "" {
		if err := checkID(req.GetDeviceId()); err != nil {
			return nil, err
		}
	}
	who, action, note, err := g.profileChange(ctx, req.GetDeviceId(), text, req.GetReason()) // fleet on etcd: controlplane.go
	if err != nil {
		return nil, err
	}
	audit := &store.AuditEntry{TimeMS: g.nowMS(), Actor: who, Action: action, Device: req.GetDeviceId(),
		Detail: fmt.Sprintf("profile %s; reason: %s", p.Name, req.GetReason()) + note, Remote: auth.RemoteFrom(ctx)}
	if g.opt.ControlPlane != nil {
		// A fleet: the device may stream to another gateway, or come here later.
		_, err = g.ingest.SetProfileAhead(ctx, req.GetDeviceId(), text, p, audit)
	} else {
		err = g.ingest.SetProfile(ctx, req.GetDeviceId(), text, p, audit)
	}
	if err != nil {
		return nil, ingestStatus(err)
	}
	return &pb.SetAlarmProfileResponse{Name: p.Name}, nil
}

// GetDeviceQuality implements FleetService.
func (g *Gateway) GetDeviceQuality(ctx context.Context, req *pb.GetDeviceQualityRequest) (*pb.GetDeviceQualityResponse, error) {
	if err := checkID(req.GetDeviceId()); err != nil {
		return nil, err
	}
	q, err := g.ingest.Quality(req.GetDeviceId())
	if err != nil {
		return nil, qualityStatus(err)
	}
	return &pb.GetDeviceQualityResponse{Quality: q}, nil
}

// ListDeviceQuality implements FleetService.
func (g *Gateway) ListDeviceQuality(ctx context.Context, _ *pb.ListDeviceQualityRequest) (*pb.ListDeviceQualityResponse, error) {
	qs, err := g.ingest.Qualities()
	if err != nil {
		return nil, qualityStatus(err)
	}
	return &pb.ListDeviceQualityResponse{Qualities: qs}, nil
}

// qualityStatus: an unknown device is NOT_FOUND; the stored sessions that
// could not be read are INTERNAL.
func qualityStatus(err error) error {
	var ie *ingest.Error
	if errors.As(err, &ie) {
		return ingestStatus(err)
	}
	return status.Errorf(codes.Internal, "%v", err)
}
