package tune

import (
	"bytes"
	"context"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/participants"
)

const participantGrid = `
base:
  name: test-dips
  conditions:
    - kind: spo2_low
      limit: 90
      hysteresis: 2
      delay: 3s
      priority: medium
sweep:
  spo2_low.limit: [90]
reference:
  rule: {below: 88, for: 30s}
participants: [P-0001]
`

// Alarms per participant-day beside per device-day, hand-worked. One
// sample a second, SpO2 96 % with 60 s dips to 85 % at minute 30 (OX-A,
// every hour) or minute 40 (OX-B); REF-1 has no dips:
//
//	OX-A   P-0001  20:00 .. 03:00  samples 20:00:00..02:59:59 (dips 20:30 .. 02:30 = 7)
//	OX-A   nobody  03:00 .. 05:00  (dips 03:30, 04:30: cut out)
//	REF-1  P-0001  21:00 .. 02:00  worn at the same time as OX-A, no dips
//	OX-B   P-0001  03:10 .. 06:00  samples 03:10:00..05:59:59 (dips 03:40, 04:40, 05:40 = 3)
//	OX-C   P-0002  all night       (not in the grid: left out)
//
// Episodes 7 + 3 = 10. Monitored device time (first to last sample of each
// trend): OX-A 7 h - 1 s = 25199, REF-1 5 h - 1 s = 17999, OX-B 2 h 50 min
// - 1 s = 10199; 53397 s, so 10 / (53397/86400) = 16.181 per device-day.
// Participant time counts OX-A and REF-1 once (REF-1 lies inside OX-A's
// span): 25199 + 10199 = 35398 s, so 10 / (35398/86400) = 24.408 per
// participant-day.
func TestTuneParticipantDays(t *testing.T) {
	g, err := ParseGrid([]byte(participantGrid), ".")
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Date(2026, 12, 1, 20, 0, 0, 0, time.UTC)
	at := func(h, m int) time.Time { return t0.Add(time.Duration(h)*time.Hour + time.Duration(m)*time.Minute) }
	trend := func(dev string, from, to time.Time, dipMin int) alarms.Trend {
		tr := alarms.Trend{Device: dev}
		for ts := from; ts.Before(to); ts = ts.Add(time.Second) {
			v := 96.0
			if dipMin >= 0 && ts.Minute() == dipMin {
				v = 85
			}
			tr.Samples = append(tr.Samples, alarms.Sample{T: float64(ts.Unix()), SpO2: v, Pulse: 60, PI: 1, SQI: 0.9})
		}
		return tr
	}
	trends := []alarms.Trend{
		trend("OX-A", at(0, 0), at(9, 0), 30),
		trend("REF-1", at(1, 0), at(6, 0), -1),
		trend("OX-B", at(7, 10), at(10, 0), 40),
		trend("OX-C", at(0, 0), at(10, 0), 20),
	}
	ms := func(tm time.Time) int64 { return tm.UnixMilli() }
	ivs := []participants.Interval{
		{Participant: "P-0001", Device: "OX-A", FromMS: ms(at(0, 0)), ToMS: ms(at(7, 0))},
		{Participant: "P-0001", Device: "REF-1", FromMS: ms(at(1, 0)), ToMS: ms(at(6, 0))},
		{Participant: "P-0001", Device: "OX-B", FromMS: ms(at(7, 10)), ToMS: ms(at(10, 0))},
		{Participant: "P-0002", Device: "OX-C", FromMS: ms(at(0, 0))},
	}
	cut, of, err := ByParticipant(trends, ivs, g.Participants, g.Reference)
	if err != nil {
		t.Fatal(err)
	}
	if len(cut) != 3 || cut[0].Device != "OX-A" || cut[1].Device != "REF-1" || cut[2].Device != "OX-B" || len(cut[0].Samples) != 25200 {
		t.Fatalf("cut trends: %d, first %s with %d samples", len(cut), cut[0].Device, len(cut[0].Samples))
	}
	res, err := Run(context.Background(), g, cut, Options{Workers: 1, TrendParticipants: of})
	if err != nil {
		t.Fatal(err)
	}
	r := res.Rows[0]
	if r.Episodes != 10 || res.MonitoredS != 53397 || res.ParticipantS != 35398 || res.Participants != 1 {
		t.Errorf("episodes %d, monitored %v s, participant %v s (%d), want 10, 53397, 35398 (1)", r.Episodes, res.MonitoredS, res.ParticipantS, res.Participants)
	}
	var b bytes.Buffer
	if err := WriteSummaryCSV(&b, res); err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSpace(b.String()), "\n")
	head, row := strings.Split(lines[1], ","), strings.Split(lines[2], ",")
	col := func(name string) string {
		for i, h := range head {
			if h == name {
				return row[i]
			}
		}
		return "(no column " + name + ")"
	}
	if col("episodes_per_device_day") != "16.181" || col("episodes_per_participant_day") != "24.408" {
		t.Errorf("per device-day %s, per participant-day %s, want 16.181 and 24.408", col("episodes_per_device_day"), col("episodes_per_participant_day"))
	}
	// A listed participant without samples, and a bad id, are refused.
	if _, _, err := ByParticipant(trends, ivs, []string{"P-0009"}, g.Reference); err == nil || !strings.Contains(err.Error(), "P-0009 has no trend samples") {
		t.Errorf("unknown participant: %v", err)
	}
	if _, err := ParseGrid([]byte(strings.Replace(participantGrid, "[P-0001]", "[maria]", 1)), "."); err == nil || !strings.Contains(err.Error(), "participants") {
		t.Errorf("a name in participants: %v", err)
	}
}
