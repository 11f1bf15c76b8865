package ingest

import (
	"math"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The API's form of what the pipeline and the store hold.

// EpisodeProto is a stored episode as FleetService shows it.
func EpisodeProto(e *store.Episode) *pb.Episode {
	out := &pb.Episode{
		EpisodeId: e.ID, DeviceId: e.Device, Condition: e.Condition, Priority: priorityFromString(e.Priority),
		OnsetUnixMs: e.OnsetMS, AnnouncedUnixMs: e.AnnouncedMS, EscalatedUnixMs: e.EscalatedMS, EndedUnixMs: e.EndedMS,
		AreaBelowLimitPctS: e.DeficitPctS, AcknowledgedBy: e.AckedBy, AcknowledgedUnixMs: e.AckedMS, Active: e.Active, Profile: e.Profile,
		MovedToGateway: e.MovedTo,
	}
	if e.MinSpO2 >= 0 {
		v := e.MinSpO2
		out.MinSpo2Pct = &v
	}
	return out
}

func priorityFromString(s string) pb.Priority {
	p, err := alarms.ParsePriority(s)
	if err != nil {
		return pb.Priority_PRIORITY_UNSPECIFIED
	}
	return priorityProto(p)
}

func priorityProto(p alarms.Priority) pb.Priority {
	switch p {
	case alarms.PriorityLow:
		return pb.Priority_PRIORITY_LOW
	case alarms.PriorityMedium:
		return pb.Priority_PRIORITY_MEDIUM
	case alarms.PriorityHigh:
		return pb.Priority_PRIORITY_HIGH
	}
	return pb.Priority_PRIORITY_UNSPECIFIED
}

// optF converts NaN to an absent optional value.
func optF(v float64) *float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return nil
	}
	return &v
}

// TrendPointProto is a stored trend point as FleetService shows it.
func TrendPointProto(p *store.Point) *pb.TrendPoint {
	return &pb.TrendPoint{
		DeviceId:   p.Device,
		TimeUnixMs: p.TimeMS,
		Spo2Pct:    optF(p.SpO2),
		PulseBpm:   optF(p.Pulse),
		PiPct:      optF(p.PI),
		Sqi:        optF(p.SQI),
		Ratio:      optF(p.Ratio),
		Flags:      uint32(p.Flags),
		Source:     pb.Source(p.Source),
	}
}
