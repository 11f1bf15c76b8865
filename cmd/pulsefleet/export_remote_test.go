package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"regexp"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/export/fhirschema"
	"github.com/pulsefleet/pulsefleet/internal/sim"
)

// An export through running gateways (FleetService.ExportTrend) is byte for
// byte the offline export of a snapshot of the same store (CSV), whole and
// for one device and range; across two gateways it holds both fleets.
func TestExportThroughGatewayEqualsOfflineExport(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	a, b := startServe(t, t.TempDir()), startServe(t, t.TempDir())
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	for i, c := range []*child{a, b} {
		rep, err := sim.Run(ctx, sim.Options{Gateway: c.grpcAddr, Devices: 3, IDPrefix: []string{"exa", "exb"}[i], Mode: sim.ModeRaw,
			RateHz: 100, Speed: 20, Duration: 2 * time.Second, Seed: uint64(30 + i)})
		if err != nil || rep.FramesAcked == 0 || rep.StreamErrors != 0 {
			t.Fatalf("sim: %v %+v", err, rep)
		}
	}
	dir := t.TempDir()
	p := func(n string) string { return filepath.Join(dir, n) }
	mustRun := func(args ...string) {
		t.Helper()
		if code, out := runBinary(t, args...); code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, out)
		}
	}
	read := func(n string) []byte {
		b, err := os.ReadFile(p(n))
		if err != nil {
			t.Fatal(err)
		}
		return b
	}
	mustRun("export", "--gateway", a.grpcAddr, "--format", "csv", "--out", p("live.csv"))
	mustRun("export", "--gateway", a.grpcAddr, "--format", "csv", "--device", "exa-0002", "--from", "0", "--to", "4102444800", "--out", p("live1.csv"))
	mustRun("backup", "--gateway", a.grpcAddr, "--out", p("snap.db"))
	mustRun("restore", "--data", p("restored"), "--from", p("snap.db"))
	mustRun("export", "--data", p("restored"), "--format", "csv", "--out", p("offline.csv"))
	mustRun("export", "--data", p("restored"), "--format", "csv", "--device", "exa-0002", "--from", "0", "--to", "4102444800", "--out", p("offline1.csv"))
	live, offline := read("live.csv"), read("offline.csv")
	if bytes.Count(live, []byte("\n")) < 10 {
		t.Fatalf("the export holds %d lines: the test proves nothing", bytes.Count(live, []byte("\n")))
	}
	if !bytes.Equal(live, offline) {
		t.Errorf("export through the gateway (%d bytes) differs from the offline export of its snapshot (%d bytes)", len(live), len(offline))
	}
	if l1, o1 := read("live1.csv"), read("offline1.csv"); !bytes.Equal(l1, o1) || len(l1) >= len(live) {
		t.Errorf("one device: through the gateway %d bytes, offline %d bytes (whole export %d)", len(l1), len(o1), len(live))
	}
	// FHIR through the gateway: the same Bundle as the offline export of the
	// snapshot (but for the Bundle's own timestamp), valid against the
	// official R4 schema.
	mustRun("export", "--gateway", a.grpcAddr, "--format", "fhir", "--out", p("live.json"))
	mustRun("export", "--data", p("restored"), "--format", "fhir", "--out", p("offline.json"))
	stamp := regexp.MustCompile(`"timestamp":"[^"]*"`)
	liveF, offF := read("live.json"), read("offline.json")
	if !bytes.Contains(liveF, []byte(`"resourceType":"Observation"`)) {
		t.Fatalf("the FHIR export through the gateway holds no Observation: the test proves nothing")
	}
	if !bytes.Equal(stamp.ReplaceAll(liveF, nil), stamp.ReplaceAll(offF, nil)) {
		t.Errorf("FHIR through the gateway (%d bytes) differs from the offline export of its snapshot (%d bytes) beyond the Bundle timestamp", len(liveF), len(offF))
	}
	schema := fhirschema.Compile(t, fhirschema.Path(t))
	if err := fhirschema.Validate(schema, string(liveF)); err != nil {
		t.Errorf("FHIR through the gateway is not valid FHIR R4: %v", err)
	}
	mustRun("export", "--gateway", a.grpcAddr+","+b.grpcAddr, "--format", "csv", "--out", p("both.csv"))
	mustRun("export", "--gateway", b.grpcAddr, "--format", "csv", "--out", p("b.csv"))
	both, onlyB := read("both.csv"), read("b.csv")
	header := bytes.SplitAfterN(live, []byte("\n"), 3)
	hdr := len(header[0]) + len(header[1]) // caution line and column names
	if want := append(append([]byte{}, live...), onlyB[hdr:]...); !bytes.Equal(both, want) {
		t.Errorf("merged export of two gateways (%d bytes) is not both fleets in device order (%d bytes)", len(both), len(want))
	}
}

// tune --gateway (a snapshot through the Backup RPC) gives the same
// summary as tune --data on a snapshot of the same history.
func TestTuneThroughGatewayEqualsTuneOnSnapshot(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	c := startServe(t, t.TempDir())
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	rep, err := sim.Run(ctx, sim.Options{Gateway: c.grpcAddr, Devices: 3, IDPrefix: "tn", Mode: sim.ModeSummary,
		RateHz: 100, Speed: 30, Duration: 3 * time.Second, Seed: 41})
	if err != nil || rep.FramesAcked < 100 || rep.StreamErrors != 0 {
		t.Fatalf("sim: %v %+v", err, rep)
	}
	dir := t.TempDir()
	p := func(n string) string { return filepath.Join(dir, n) }
	mustRun := func(args ...string) {
		t.Helper()
		if code, out := runBinary(t, args...); code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, out)
		}
	}
	os.WriteFile(p("grid.yaml"), []byte("base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [0s, 30s]\nreference:\n  rule: {below: 92, for: 10s}\n"), 0o600)
	mustRun("tune", "--grid", p("grid.yaml"), "--gateway", c.grpcAddr, "--out", p("live"))
	mustRun("backup", "--gateway", c.grpcAddr, "--out", p("snap.db"))
	mustRun("restore", "--data", p("restored"), "--from", p("snap.db"))
	mustRun("tune", "--grid", p("grid.yaml"), "--data", p("restored"), "--out", p("offline"))
	live, err1 := os.ReadFile(p("live/summary.csv"))
	offline, err2 := os.ReadFile(p("offline/summary.csv"))
	if err1 != nil || err2 != nil {
		t.Fatal(err1, err2)
	}
	if bytes.Count(live, []byte("\n")) < 3 || !bytes.Equal(live, offline) {
		t.Errorf("summary.csv through the gateway (%d bytes) differs from --data on a snapshot (%d bytes):\n%s\n---\n%s", len(live), len(offline), live, offline)
	}
}
