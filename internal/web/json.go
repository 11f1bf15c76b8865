package web

import (
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/estimator"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// The page's JSON: hand-mapped from the API's messages (names and units
// the page's script reads; absent values are null, never zero).

// The page's JSON shapes, for Go clients of the page (the gateway's tests).
type (
	DeviceJSON  = webDevice
	QualityJSON = webQuality
	BucketJSON  = webBucket
	EpisodeJSON = webEpisode
)

type webPoint struct {
	TimeMS int64    `json:"t_ms"`
	SpO2   *float64 `json:"spo2"`
	Pulse  *float64 `json:"pulse"`
	PI     *float64 `json:"pi"`
	SQI    *float64 `json:"sqi"`
	Flags  []string `json:"flags,omitempty"`
	Source string   `json:"source,omitempty"`
}

type webEpisode struct {
	ID          string   `json:"id"` // a string: 64-bit ids do not fit a JS number
	Device      string   `json:"device"`
	Condition   string   `json:"condition"`
	Priority    string   `json:"priority"`
	OnsetMS     int64    `json:"onset_ms"`
	AnnouncedMS int64    `json:"announced_ms,omitempty"`
	EscalatedMS int64    `json:"escalated_ms,omitempty"`
	EndedMS     int64    `json:"ended_ms,omitempty"`
	MinSpO2     *float64 `json:"min_spo2"`
	AckedBy     string   `json:"acked_by,omitempty"`
	AckedMS     int64    `json:"acked_ms,omitempty"`
	Active      bool     `json:"active"`
}

type webDevice struct {
	ID            string            `json:"id"`
	Model         string            `json:"model,omitempty"`
	Firmware      string            `json:"firmware,omitempty"`
	Mode          string            `json:"mode,omitempty"`
	Labels        map[string]string `json:"labels,omitempty"`
	Connected     bool              `json:"connected"`
	LastSeenMS    int64             `json:"last_seen_ms"`
	SessionMS     int64             `json:"session_start_ms"`
	Latest        *webPoint         `json:"latest"`
	Priority      string            `json:"priority"` // "", "low", "medium", "high"
	Conditions    []string          `json:"conditions"`
	PausedUntilMS int64             `json:"paused_until_ms,omitempty"`
	Profile       string            `json:"profile,omitempty"`
	Calibration   string            `json:"calibration,omitempty"`
	BatteryPct    *float64          `json:"battery_pct"`
	Uptime1h      float64           `json:"uptime_1h"`
	Uptime24h     float64           `json:"uptime_24h"`
	Active        []webEpisode      `json:"active_episodes"`
	Spark         []webSpark        `json:"spark,omitempty"`
}

type webSpark struct {
	TimeMS int64    `json:"t_ms"`
	SpO2   *float64 `json:"spo2"`
}

type webQuality struct {
	Sessions           uint64   `json:"sessions"`
	Reconnects         uint64   `json:"reconnects"`
	Uptime1h           float64  `json:"uptime_1h"`
	Uptime24h          float64  `json:"uptime_24h"`
	Uptime7d           float64  `json:"uptime_7d"`
	ChunksAccepted     uint64   `json:"chunks_accepted"`
	ChunksLost         uint64   `json:"chunks_lost"`
	Duplicates         uint64   `json:"duplicates"`
	LateChunks         uint64   `json:"late_chunks"`
	ChunksRejected     uint64   `json:"chunks_rejected"`
	ClockDriftPPM      *float64 `json:"clock_drift_ppm"`          // null until estimated
	EffectiveRateHz    *float64 `json:"effective_sample_rate_hz"` // null without raw samples
	ValidSpO2Share     float64  `json:"valid_spo2_share"`
	ClippingShare      float64  `json:"clipping_share"`
	LowResolutionShare float64  `json:"low_resolution_share"`
	SQI                *webDist `json:"sqi"`
	PI                 *webDist `json:"pi_pct"`
	BatteryPct         *float64 `json:"battery_pct"`
}

type webDist struct {
	Count uint64  `json:"count"`
	P10   float64 `json:"p10"`
	P50   float64 `json:"p50"`
	P90   float64 `json:"p90"`
}

type webBucket struct {
	StartMS  int64    `json:"t_ms"`
	Points   uint32   `json:"points"`
	SpO2     *float64 `json:"spo2"`
	SpO2Min  *float64 `json:"spo2_min"`
	SpO2Max  *float64 `json:"spo2_max"`
	Pulse    *float64 `json:"pulse"`
	PI       *float64 `json:"pi"`
	SQI      *float64 `json:"sqi"`
	SQIMin   *float64 `json:"sqi_min"`
	Coverage float64  `json:"coverage"` // share of the step's seconds with a point
}

func priorityName(p pb.Priority) string {
	switch p {
	case pb.Priority_PRIORITY_LOW:
		return "low"
	case pb.Priority_PRIORITY_MEDIUM:
		return "medium"
	case pb.Priority_PRIORITY_HIGH:
		return "high"
	}
	return ""
}

// flagNames name the estimator flags in the page's JSON (the names of
// pulsefleet_estimator_flags_total's labels).
var flagNames = []struct {
	flag estimator.Flags
	name string
}{{estimator.FlagNoPulse, "no_pulse"}, {estimator.FlagSensorOff, "sensor_off"}, {estimator.FlagClipping, "clipping"},
	{estimator.FlagMotion, "motion"}, {estimator.FlagLowResolution, "low_resolution"}}

func webPointOf(p *pb.TrendPoint) *webPoint {
	if p == nil {
		return nil
	}
	out := &webPoint{TimeMS: p.GetTimeUnixMs(), SpO2: p.Spo2Pct, Pulse: p.PulseBpm, PI: p.PiPct, SQI: p.Sqi}
	for _, f := range flagNames {
		if p.GetFlags()&uint32(f.flag) != 0 {
			out.Flags = append(out.Flags, f.name)
		}
	}
	switch p.GetSource() {
	case pb.Source_SOURCE_GATEWAY:
		out.Source = "gateway"
	case pb.Source_SOURCE_DEVICE:
		out.Source = "device"
	}
	return out
}

func webEpisodeOf(e *pb.Episode) webEpisode {
	return webEpisode{ID: strconv.FormatUint(e.GetEpisodeId(), 10), Device: e.GetDeviceId(), Condition: e.GetCondition(),
		Priority: priorityName(e.GetPriority()), OnsetMS: e.GetOnsetUnixMs(), AnnouncedMS: e.GetAnnouncedUnixMs(),
		EscalatedMS: e.GetEscalatedUnixMs(), EndedMS: e.GetEndedUnixMs(), MinSpO2: e.MinSpo2Pct,
		AckedBy: e.GetAcknowledgedBy(), AckedMS: e.GetAcknowledgedUnixMs(), Active: e.GetActive()}
}

func webDeviceOf(d *pb.Device) webDevice {
	out := webDevice{ID: d.GetDeviceId(), Model: d.GetModel(), Firmware: d.GetFirmware(),
		Mode: strings.TrimPrefix(strings.ToLower(d.GetMode().String()), "mode_"), Labels: d.GetLabels(),
		Connected: d.GetConnected(), LastSeenMS: d.GetLastSeenUnixMs(), SessionMS: d.GetSessionStartUnixMs(),
		Latest: webPointOf(d.GetLatest()), Priority: priorityName(d.GetAlarmPriority()), Conditions: d.GetActiveConditions(),
		PausedUntilMS: d.GetAlarmsPausedUntilUnixMs(), Profile: d.GetProfile(), Calibration: d.GetCalibration(),
		Active: []webEpisode{}}
	if out.Mode == "unspecified" {
		out.Mode = ""
	}
	if out.Conditions == nil {
		out.Conditions = []string{}
	}
	if b := d.GetBatteryPct(); b >= 0 {
		out.BatteryPct = &b
	}
	return out
}

func webQualityOf(q *pb.DeviceQuality) *webQuality {
	out := &webQuality{Sessions: q.GetSessions(), Reconnects: q.GetReconnects(), Uptime1h: q.GetUptime_1H(), Uptime24h: q.GetUptime_24H(),
		Uptime7d: q.GetUptime_7D(), ChunksAccepted: q.GetChunksAccepted(), ChunksLost: q.GetChunksLost(), Duplicates: q.GetDuplicates(),
		LateChunks: q.GetLateChunks(), ChunksRejected: q.GetChunksRejected(), ClockDriftPPM: q.ClockDriftPpm,
		EffectiveRateHz: q.EffectiveSampleRateHz, ValidSpO2Share: q.GetValidSpo2Share(), ClippingShare: q.GetClippingShare(),
		LowResolutionShare: q.GetLowResolutionShare()}
	dist := func(d *pb.Distribution) *webDist {
		if d == nil || d.GetCount() == 0 {
			return nil
		}
		return &webDist{Count: d.GetCount(), P10: d.GetP10(), P50: d.GetP50(), P90: d.GetP90()}
	}
	out.SQI, out.PI = dist(q.GetSqi()), dist(q.GetPiPct())
	if b := q.GetBatteryPct(); b >= 0 {
		out.BatteryPct = &b
	}
	return out
}

func statMean(s *pb.Stat) *float64 {
	if s.GetCount() == 0 {
		return nil
	}
	v := s.GetMean()
	return &v
}

func statMin(s *pb.Stat) *float64 {
	if s.GetCount() == 0 {
		return nil
	}
	v := s.GetMin()
	return &v
}

func statMax(s *pb.Stat) *float64 {
	if s.GetCount() == 0 {
		return nil
	}
	v := s.GetMax()
	return &v
}
