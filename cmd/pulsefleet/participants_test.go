package main

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/participants"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Per participant-night indices, hand-worked. Night 22:00-07:00 UTC. One
// trend row a second, SpO2 96 % with 30 s dips every 15 min (at minute 5,
// 20, 35 and 50 of the device's run):
//
//	OX-A  P-0001  21:00:00 .. 02:59:59  dips to 92 %   (battery fails at 03:00)
//	OX-A  (none)  03:00:00 .. 03:59:59  dips to 80 %   (not enrolled: must not count)
//	OX-B  P-0001  03:10:00 .. 07:29:59  dips to 88 %   (the swap, at night)
//	OX-C  P-0002  22:00:00 .. 06:59:59  SpO2 80 %      (another participant)
//
// Night "2026-12-01" = 2026-12-01 22:00 .. 2026-12-02 07:00:
//
//	OX-A: samples 22:00:00..02:59:59 = 18000, 17999 s of intervals = 5.000 h;
//	      dips at 22:05, 22:20, ..., 02:50 = 5 h x 4 = 20 events (the 4 dips
//	      of 21:00-22:00 lie before the night); ODI 20 / 4.9997 = 4.00 /h at
//	      3 and at 4 points (a 4-point drop); T90 0 (92 % is not below 90 %).
//	OX-B: samples 03:10:00..06:59:59 = 13800, 13799 s = 3.833 h; dips at
//	      03:15, 03:30, ..., 06:45 = 15 events (07:00's is after the night);
//	      ODI 15 / 3.8331 = 3.91 /h; T90 = 15 x 30 s / 13799 s = 3.26 %.
func TestReplayParticipantNights(t *testing.T) {
	var b strings.Builder
	b.WriteString("t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi,ratio,flags,source,participant\n")
	rows := func(dev, pid, from string, n int, dip string) {
		t0, _ := time.Parse(time.RFC3339, from)
		for i := 0; i < n; i++ {
			v := "96"
			if k := i % 900; k >= 300 && k < 330 {
				v = dip
			}
			fmt.Fprintf(&b, "%d,%s,%s,60,1,0.9,,0,device,%s\n", t0.Unix()+int64(i), dev, v, pid)
		}
	}
	rows("OX-A", "P-0001", "2026-12-01T21:00:00Z", 6*3600, "92")
	rows("OX-A", "", "2026-12-02T03:00:00Z", 3600, "80")
	rows("OX-B", "P-0001", "2026-12-02T03:10:00Z", 15600, "88")
	rows("OX-C", "P-0002", "2026-12-01T22:00:00Z", 9*3600, "80")
	dir := t.TempDir()
	in := filepath.Join(dir, "trend.csv")
	if err := os.WriteFile(in, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	idx := filepath.Join(dir, "nights.csv")
	code, _, errs := runCmd("replay", "--profile", "adult-ward-pilot", "--in", in, "--out", filepath.Join(dir, "ep.csv"),
		"--indices", idx, "--participant", "P-0001", "--night", "22:00-07:00", "--tz", "UTC")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	got, _ := os.ReadFile(idx)
	want := "# night window 22:00-07:00 UTC\n" +
		"participant,night,night_from,night_to,device,valid_hours,events_3pct,odi_3pct_per_h,events_4pct,odi_4pct_per_h,t90_pct\n" +
		"P-0001,2026-12-01,2026-12-01T22:00:00Z,2026-12-02T07:00:00Z,OX-A,5.000,20,4.00,20,4.00,0.00\n" +
		"P-0001,2026-12-01,2026-12-01T22:00:00Z,2026-12-02T07:00:00Z,OX-B,3.833,15,3.91,15,3.91,3.26\n"
	if afterCaution(t, "nights", string(got)) != want {
		t.Errorf("got:\n%s\nwant (after the caution line):\n%s", got, want)
	}
	// The same night in Berlin (UTC+1) is 21:00Z..06:00Z: OX-A gains
	// 21:00-22:00 (4 more dips, 24 events in 21599 s = 5.9997 h, shown 6.000; 4.00 /h), OX-B
	// loses 06:00-07:00 (11 dips in 2.833 h = 3.88 /h; T90 330 s / 10199 s = 3.24 %).
	code, _, errs = runCmd("replay", "--profile", "adult-ward-pilot", "--in", in, "--out", filepath.Join(dir, "ep.csv"),
		"--indices", idx, "--participant", "P-0001", "--tz", "Europe/Berlin")
	got, _ = os.ReadFile(idx)
	if code != 0 || !strings.Contains(string(got), "P-0001,2026-12-01,2026-12-01T22:00:00+01:00,2026-12-02T07:00:00+01:00,OX-A,6.000,24,4.00,24,4.00,0.00\n") ||
		!strings.Contains(string(got), ",OX-B,2.833,11,3.88,11,3.88,3.24\n") {
		t.Errorf("Berlin nights: exit %d %s\n%s", code, errs, got)
	}
	// Refusals name the flag.
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"--participant", "maria"}, "--participant"},
		{[]string{"--participant", "P-0001", "--night", "22:00"}, "night"},
		{[]string{"--participant", "P-0001", "--tz", "Mars/Olympus"}, "--tz"},
		{[]string{"--participant", "P-0009"}, "no row of participant P-0009"},
	} {
		args := append([]string{"replay", "--profile", "adult-ward-pilot", "--in", in, "--out", filepath.Join(dir, "ep.csv")}, c.args...)
		if code, _, errs := runCmd(args...); code == 0 || !strings.Contains(errs, c.want) {
			t.Errorf("%v: exit %d, %q, want %q", c.args, code, errs, c.want)
		}
	}
}

// episodes --participant keeps the episodes whose onset lies in one of the
// participant's enrolments (the store test's ward timeline): of OX-A at
// 01:00 (P-0001), OX-A at 19:30 the evening before (nobody's), OX-B at 05:00
// (P-0001, after the swap) and OX-A at 10:30 (P-0002), P-0001 has 2.
func TestEpisodesOfParticipant(t *testing.T) {
	ms := func(s string) int64 { tm, _ := time.Parse(time.RFC3339, s); return tm.UnixMilli() }
	ivs := []participants.Interval{
		{Participant: "P-0001", Device: "OX-A", FromMS: ms("2026-12-01T20:00:00Z"), ToMS: ms("2026-12-02T03:00:00Z")},
		{Participant: "P-0001", Device: "OX-B", FromMS: ms("2026-12-02T03:10:00Z"), ToMS: ms("2026-12-02T08:00:00Z")},
		{Participant: "P-0002", Device: "OX-A", FromMS: ms("2026-12-02T10:00:00Z")},
	}
	var rows []episodeRow
	for _, e := range []struct{ dev, at string }{{"OX-A", "2026-12-02T01:00:00Z"}, {"OX-A", "2026-12-01T19:30:00Z"}, {"OX-B", "2026-12-02T05:00:00Z"}, {"OX-A", "2026-12-02T10:30:00Z"}} {
		rows = append(rows, episodeRow{Episode: &pb.Episode{DeviceId: e.dev, OnsetUnixMs: ms(e.at)}})
	}
	got := participantEpisodes(rows, ivs, "P-0001")
	if len(got) != 2 || got[0].Episode.GetDeviceId() != "OX-A" || got[1].Episode.GetDeviceId() != "OX-B" {
		t.Errorf("P-0001's episodes: %v", got)
	}
}
