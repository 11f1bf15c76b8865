package main

import (
	"context"
	"encoding/csv"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim"
)

// The participants commands against a real gateway: enrol, a refused
// overlap, list, trend and export stitched by participant, end, and delete
// on withdrawal, after which no command returns the participant's points
// and the other participant's export is byte for byte what it was.
func TestParticipantsCommandsRealGateway(t *testing.T) {
	addr, _, stop := startTestGateway(t)
	defer stop()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if _, err := sim.Run(ctx, sim.Options{Gateway: addr, Devices: 2, Mode: sim.ModeSummary, Duration: 3 * time.Second, Seed: 3}); err != nil {
		t.Fatal(err)
	}
	gw := []string{"--gateway", addr}
	must := func(args ...string) string {
		t.Helper()
		code, out, errs := runCmd(append(args, gw...)...)
		if code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, errs)
		}
		return out
	}
	must("participants", "enrol", "--participant", "P-0001", "--device", "sim-0001", "--from", "1h", "--note", "bed 4")
	must("participants", "enrol", "--participant", "P-0002", "--device", "sim-0002", "--from", "1h")
	code, _, errs := runCmd(append([]string{"participants", "enrol", "--participant", "P-0003", "--device", "sim-0001", "--from", "30m"}, gw...)...)
	if code != 1 || !strings.Contains(errs, "FailedPrecondition") || !strings.Contains(errs, "already enrolled to P-0001") {
		t.Errorf("overlap: exit %d %q", code, errs)
	}
	if code, _, errs := runCmd(append([]string{"participants", "enrol", "--participant", "Maria", "--device", "sim-0001"}, gw...)...); code != 2 || !strings.Contains(errs, "--participant") {
		t.Errorf("a name: exit %d %q", code, errs)
	}
	if out := must("participants", "list", "--format", "csv"); strings.Count(out, "\n") != 3 || !strings.Contains(out, "P-0001,sim-0001,") || !strings.Contains(out, ",bed 4,") {
		t.Errorf("list:\n%s", out)
	}
	if out := must("devices"); !strings.Contains(out, "sim-0001  P-0001") {
		t.Errorf("devices without the participant:\n%s", out)
	}
	// trend --participant: sim-0001's rows, each with P-0001.
	byDevice := must("trend", "--device", "sim-0001", "--from", "1h")
	byPID := must("trend", "--participant", "P-0001", "--from", "1h")
	nDev, nPID := strings.Count(byDevice, "\n"), strings.Count(byPID, "\n")
	if nDev < 3 || nDev != nPID || strings.Count(byPID, ",sim-0001,") != nPID-2 || strings.Count(byPID, ",P-0001\n") != nPID-2 {
		t.Errorf("trend --participant: %d lines, by device %d:\n%s", nPID, nDev, byPID)
	}
	all := must("export", "--format", "csv")
	if !strings.Contains(all, ",P-0001\n") || !strings.Contains(all, ",P-0002\n") {
		t.Errorf("export has no participant column values:\n%.400s", all)
	}
	other := must("export", "--format", "csv", "--participant", "P-0002")

	code, _, errs = runCmd(append([]string{"participants", "delete", "--participant", "P-0001"}, gw...)...)
	if code != 2 || !strings.Contains(errs, "--confirm") {
		t.Errorf("delete without --confirm: exit %d %q", code, errs)
	}
	code, _, errs = runCmd(append([]string{"participants", "delete", "--participant", "P-0001", "--confirm"}, gw...)...)
	if code != 1 || !strings.Contains(errs, "end it first") {
		t.Errorf("delete while enrolled: exit %d %q", code, errs)
	}
	must("participants", "end", "--participant", "P-0001")
	out := must("participants", "delete", "--participant", "P-0001", "--confirm")
	if !strings.Contains(out, "deleted participant P-0001: ") || !strings.Contains(out, " trend points") {
		t.Errorf("delete: %s", out)
	}
	if out := must("trend", "--device", "sim-0001", "--from", "1h"); strings.Count(out, "\n") != 2 {
		t.Errorf("trend still returns deleted points:\n%s", out)
	}
	if out := must("export", "--format", "csv"); strings.Contains(out, ",sim-0001,") || strings.Contains(out, "P-0001") {
		t.Errorf("export still returns P-0001's points")
	}
	if out := must("export", "--format", "fhir"); strings.Contains(out, "sim-0001.") || strings.Contains(out, "P-0001") {
		t.Errorf("FHIR export still returns P-0001's Observations")
	}
	if code, _, _ := runCmd(append([]string{"trend", "--participant", "P-0001", "--from", "1h"}, gw...)...); code != 1 {
		t.Errorf("trend --participant of a deleted participant: exit %d, want 1 (no enrolment)", code)
	}
	if after := must("export", "--format", "csv", "--participant", "P-0002"); after != other {
		t.Errorf("P-0002's export changed")
	}
	if out := must("audit", "--action", "participants.delete"); !strings.Contains(out, "participant P-0001 withdrawn") {
		t.Errorf("audit:\n%s", out)
	}
}

// A participant wearing two devices at once (a prototype and a reference
// oximeter): trend --participant interleaves both devices' rows in time
// order, raw and in steps, with every row of each device kept.
func TestParticipantTrendOfTwoDevicesAtOnceIsInTimeOrder(t *testing.T) {
	addr, _, stop := startTestGateway(t)
	defer stop()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if _, err := sim.Run(ctx, sim.Options{Gateway: addr, Devices: 2, Mode: sim.ModeSummary, Duration: 4 * time.Second, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	must := func(args ...string) string {
		t.Helper()
		code, out, errs := runCmd(append(args, "--gateway", addr)...)
		if code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, errs)
		}
		return out
	}
	must("participants", "enrol", "--participant", "P-0009", "--device", "sim-0001", "--from", "1h")
	must("participants", "enrol", "--participant", "P-0009", "--device", "sim-0002", "--from", "1h")
	for _, step := range []string{"", "1s"} {
		args := []string{"trend", "--participant", "P-0009", "--from", "1h"}
		if step != "" {
			args = append(args, "--step", step)
		}
		out := must(args...)
		rows := trendCSV(t, out)
		perDevice := map[string]int{}
		prev := -1.0
		for i, r := range rows {
			col := "t_s"
			if step != "" {
				col = "start_s"
			}
			ts, err := strconv.ParseFloat(r[col], 64)
			if err != nil {
				t.Fatalf("step %q row %d: %s %q: %v", step, i, col, r[col], err)
			}
			if ts < prev {
				t.Fatalf("step %q row %d at %v after a row at %v: not in time order\n%s", step, i, ts, prev, out)
			}
			prev = ts
			perDevice[r["device"]]++
			if r["participant"] != "P-0009" {
				t.Errorf("row %d participant %q", i, r["participant"])
			}
		}
		for _, dev := range []string{"sim-0001", "sim-0002"} {
			devArgs := []string{"trend", "--device", dev, "--from", "1h"}
			if step != "" {
				devArgs = append(devArgs, "--step", step)
			}
			want := len(trendCSV(t, must(devArgs...)))
			if want == 0 || perDevice[dev] != want {
				t.Errorf("step %q: %s has %d rows in the participant's trend, %d in its own", step, dev, perDevice[dev], want)
			}
		}
	}
}

// trendCSV reads trend CSV (after its caution line) into rows by column.
func trendCSV(t *testing.T, out string) []map[string]string {
	t.Helper()
	rows, err := csv.NewReader(strings.NewReader(afterCaution(t, "trend CSV", out))).ReadAll()
	if err != nil || len(rows) == 0 {
		t.Fatalf("trend CSV: %v\n%s", err, out)
	}
	var maps []map[string]string
	for _, r := range rows[1:] {
		m := map[string]string{}
		for i, c := range rows[0] {
			m[c] = r[i]
		}
		maps = append(maps, m)
	}
	return maps
}
