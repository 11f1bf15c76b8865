package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/sim/sink"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

func simRun(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	code = run(ctx, args, stdio{in: strings.NewReader(""), out: &out, err: &errb})
	return code, out.String(), errb.String()
}

func startTestSink(t *testing.T, opts sink.Options) *sink.Running {
	t.Helper()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	r := sink.Start(lis, opts)
	t.Cleanup(func() { r.Stop(2 * time.Second) })
	return r
}

// The last stdout line is the contract's JSON object.
func TestSimCommandEndsWithOneJSONLine(t *testing.T) {
	s := startTestSink(t, sink.Options{})
	tokFile := filepath.Join(t.TempDir(), "tokens")
	perDev := filepath.Join(t.TempDir(), "per-device.csv")
	os.WriteFile(tokFile, []byte("# device token\nw-0001 one\nw-0002 two\n"), 0o600)
	code, out, errs := simRun(t, "sim", "--gateway", s.Addr(), "--devices", "3", "--rate", "50", "--duration", "1s",
		"--mode", "raw", "--seed", "4", "--corrupt-rate", "0.2", "--drop-every", "400ms", "--clock-drift-ppm", "50",
		"--id-prefix", "w", "--token-file", tokFile, "--progress-every", "300ms", "--per-device-out", perDev)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if len(lines) != 1 {
		t.Fatalf("stdout has %d lines, want exactly one JSON line: %q", len(lines), out)
	}
	var rep map[string]any
	if err := json.Unmarshal([]byte(lines[0]), &rep); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"devices", "frames_sent", "frames_acked", "samples_sent", "rejected", "ack_p50_ms", "ack_p99_ms"} {
		if _, ok := rep[k]; !ok {
			t.Errorf("JSON lacks %q: %s", k, lines[0])
		}
	}
	if rep["devices"] != float64(3) {
		t.Errorf("devices %v, want 3", rep["devices"])
	}
	if st := s.Stats(); float64(st.Samples) != rep["samples_acked"] {
		t.Errorf("sink holds %d samples, report acknowledged %v", st.Samples, rep["samples_acked"])
	}
	if !strings.Contains(errs, "sim: ") {
		t.Errorf("no progress on stderr: %q", errs)
	}
	if ids := s.DeviceIDs(); len(ids) != 3 || ids[0] != "w-0001" {
		t.Errorf("devices at the sink %v, want w-0001..w-0003", ids)
	}
	csv, err := os.ReadFile(perDev)
	if err != nil {
		t.Fatal(err)
	}
	rows := strings.Split(strings.TrimSpace(string(csv)), "\n")
	if len(rows) != 4 || rows[0] != "device,mode,frames_acked,samples_acked,acked_through" {
		t.Fatalf("per-device CSV %q", csv)
	}
	for _, row := range rows[1:] {
		f := strings.Split(row, ",")
		ds, _ := s.Device(f[0])
		if f[1] != "raw" || f[3] != strconv.FormatUint(ds.Samples, 10) {
			t.Errorf("per-device row %q, sink holds %d samples", row, ds.Samples)
		}
	}
}

func TestSimCommandScenarioAtSpeed(t *testing.T) {
	s := startTestSink(t, sink.Options{})
	code, out, errs := simRun(t, "sim", "--gateway", s.Addr(), "--scenario", "home-week", "--speed", "3600", "--duration", "1s")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	var rep struct {
		Devices     int     `json:"devices"`
		FramesAcked uint64  `json:"frames_acked"`
		Speed       float64 `json:"speed"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatal(err)
	}
	if rep.Devices != 6 || rep.Speed != 3600 || rep.FramesAcked == 0 {
		t.Errorf("report %+v, want 6 home devices at 3600x with data acknowledged", rep)
	}
}

func TestSimCommandUsageErrors(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"sim"}, "--gateway is required"},
		{[]string{"sim", "--gateway", "x:1", "--mode", "ppg"}, `--mode "ppg", want raw or summary`},
		{[]string{"sim", "--gateway", "x:1", "--rate", "5"}, "--rate 5 Hz, want 25..1000"},
		{[]string{"sim", "--gateway", "x:1", "--corrupt-rate", "1.5"}, "--corrupt-rate 1.5, want 0..1"},
		{[]string{"sim", "--gateway", "x:1", "--scenario", "ward-night", "--devices", "3"}, "leave out --devices"},
	} {
		code, _, errs := simRun(t, tc.args...)
		if code != 2 || !strings.Contains(errs, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want 2 and %q", tc.args, code, errs, tc.want)
		}
	}
	code, _, errs := simRun(t, "sim", "--gateway", "x:1", "--scenario", "no-such-scenario")
	if code != 1 || !strings.Contains(errs, "neither a shipped scenario") {
		t.Errorf("unknown scenario: exit %d, %q", code, errs)
	}
	if code, out, _ := simRun(t, "sim", "--help"); code != 0 || out != "" {
		t.Errorf("--help: exit %d", code)
	}
}

// startTestGateway runs the gateway exactly as `serve` wires it, on a
// temporary data directory and loopback ports.
func startTestGateway(t *testing.T) (addr, dir string, stop func() error) {
	t.Helper()
	c := defaultServeConfig()
	c.Data, c.GRPCListen, c.HTTPListen, c.LogLevel = t.TempDir(), "127.0.0.1:0", "127.0.0.1:0", "error"
	rg, stop, err := startGateway(context.Background(), c, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	return rg.GRPCAddr, c.Data, stop
}

// The acceptance check at a small scale: raw devices against the
// real gateway with streams dropped and corrupt chunks injected; afterwards
// every acknowledged chunk is in the store exactly once (the ingest ledger
// holds each sequence number once, with the device's acknowledged samples),
// and every corrupt chunk was rejected or skipped, never stored.
func TestSimAgainstGatewayKeepsEveryAcknowledgedChunkOnce(t *testing.T) {
	devices, dur := 20, 10*time.Second
	if testing.Short() {
		devices, dur = 8, 3*time.Second
	}
	addr, dir, stop := startTestGateway(t)
	ctx, cancel := context.WithTimeout(context.Background(), dur+60*time.Second)
	defer cancel()
	rep, err := sim.Run(ctx, sim.Options{Gateway: addr, Devices: devices, Mode: sim.ModeRaw, RateHz: 100,
		Duration: dur, Seed: 21, DropEvery: dur / 4, CorruptRate: 0.05, ClockDriftPPM: 100})
	if err != nil {
		t.Fatal(err)
	}
	if err := stop(); err != nil {
		t.Fatalf("stop gateway: %v", err)
	}
	t.Logf("report %+v", *rep)
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	ledger, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	var chunks uint64
	for id, d := range rep.PerDevice {
		l := ledger[id]
		chunks += l.Chunks
		if !l.Distinct {
			t.Errorf("device %s: a sequence number stored twice", id)
		}
		if l.Chunks != d.FramesAcked || l.Samples != d.SamplesAcked {
			t.Errorf("device %s: store holds %d chunks / %d samples, device was told %d / %d are durable",
				id, l.Chunks, l.Samples, d.FramesAcked, d.SamplesAcked)
		}
	}
	if chunks != rep.FramesAcked {
		t.Errorf("store holds %d chunks, %d acknowledged", chunks, rep.FramesAcked)
	}
	if rep.UnackedAtEnd != 0 || rep.CorruptAcked != 0 || rep.ResumeRegress != 0 || rep.RejectedValid != 0 {
		t.Errorf("unacknowledged %d, corrupt acknowledged %d, resume regressions %d, valid rejected %d: want none",
			rep.UnackedAtEnd, rep.CorruptAcked, rep.ResumeRegress, rep.RejectedValid)
	}
	if rep.CorruptSent == 0 || rep.CorruptSent != rep.Rejected+rep.CorruptSkipped {
		t.Errorf("corrupt sent %d, rejected %d + skipped %d", rep.CorruptSent, rep.Rejected, rep.CorruptSkipped)
	}
	if rep.DropsInjected == 0 || rep.Reconnects == 0 {
		t.Errorf("no stream was dropped: %+v", *rep)
	}
}

// Time compression can push a device past the gateway's per-stream message
// rate (200/s by default): the gateway rejects with RATE_LIMITED, the device
// holds off and resends from that message, and in the end the store holds
// every acknowledged message once.
func TestSimRateLimitedDevicesResendEverything(t *testing.T) {
	addr, dir, stop := startTestGateway(t)
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	rep, err := sim.Run(ctx, sim.Options{Gateway: addr, Devices: 2, Mode: sim.ModeSummary, Speed: 400,
		Duration: 2 * time.Second, Seed: 2})
	if err != nil {
		t.Fatal(err)
	}
	if err := stop(); err != nil {
		t.Fatal(err)
	}
	db, err := store.Open(dir, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	ledger, err := db.LedgerTotals()
	if err != nil {
		t.Fatal(err)
	}
	if rep.RateLimited == 0 {
		t.Errorf("no rate-limit rejection at 400 messages/s: %+v", *rep)
	}
	if rep.UnackedAtEnd != 0 || rep.RejectedValid != 0 || rep.FramesAcked != rep.FramesSent {
		t.Errorf("sent %d, acknowledged %d, unacknowledged %d, valid rejected %d", rep.FramesSent, rep.FramesAcked, rep.UnackedAtEnd, rep.RejectedValid)
	}
	for id, d := range rep.PerDevice {
		if l := ledger[id]; l.Chunks != d.FramesAcked || !l.Distinct {
			t.Errorf("device %s: store %d chunks (distinct %v), acknowledged %d", id, l.Chunks, l.Distinct, d.FramesAcked)
		}
	}
}
