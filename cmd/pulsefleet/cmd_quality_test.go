package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"io"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// startQualityGateway runs a real gateway on loopback and streams summaries
// of the given devices into it: n sequence numbers each, skip left out
// (never sent: a gap), with a battery report.
func startQualityGateway(t *testing.T, devices []string, n uint64, skip map[uint64]bool) string {
	t.Helper()
	c := defaultServeConfig()
	c.Data, c.GRPCListen, c.HTTPListen, c.LogLevel, c.BatchDelay = t.TempDir(), "127.0.0.1:0", "127.0.0.1:0", "error", 5*time.Millisecond
	rg, stop, err := startGateway(context.Background(), c, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := stop(); err != nil {
			t.Errorf("stop: %v", err)
		}
	})
	conn, err := grpc.NewClient(rg.GRPCAddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	base := time.Now().Add(-time.Minute).UnixMilli()
	for _, id := range devices {
		ctx, cancel := context.WithCancel(context.Background())
		st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
		if err != nil {
			t.Fatal(err)
		}
		send := func(m *pb.ConnectRequest) {
			if err := st.Send(m); err != nil {
				t.Fatal(err)
			}
		}
		send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: id, Mode: pb.Mode_MODE_SUMMARY}}})
		send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Status{Status: &pb.DeviceStatus{BatteryPct: 81, TemperatureC: 30}}})
		var last uint64
		for s := uint64(1); s <= n; s++ {
			if skip[s] {
				continue
			}
			v, q := 96.0, 0.8
			if s%5 == 0 {
				send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s, DeviceTimeUnixMs: base + int64(s)*1000, Quality: &q}}})
			} else {
				send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s, DeviceTimeUnixMs: base + int64(s)*1000, Spo2Pct: &v, Quality: &q}}})
			}
			last = s
		}
		for {
			m, err := st.Recv()
			if err != nil {
				t.Fatal(err)
			}
			if m.GetAck().GetThroughSequence() >= last {
				break
			}
		}
		_ = st.CloseSend()
		cancel()
	}
	return rg.GRPCAddr
}

func runQualityCmd(t *testing.T, args ...string) (code int, out, errOut string) {
	t.Helper()
	var o, e bytes.Buffer
	code = run(context.Background(), args, stdio{in: strings.NewReader(""), out: &o, err: &e})
	return code, o.String(), e.String()
}

// Two gateways of a sharded fleet are merged; the figures are what was sent:
// 20 sequence numbers with 2 skipped (lost), every fifth without SpO2.
func TestQualityCommandMergesGateways(t *testing.T) {
	a := startQualityGateway(t, []string{"ward-a-01", "ward-a-02"}, 20, map[uint64]bool{7: true, 8: true})
	b := startQualityGateway(t, []string{"home-b-01"}, 20, nil)

	code, out, errOut := runQualityCmd(t, "quality", "--gateway", a+","+b, "--format", "csv")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	rows, err := csv.NewReader(strings.NewReader(afterCaution(t, "quality CSV", out))).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(rows[0], ",") != strings.Join(qualityColumns, ",") || len(rows) != 4 {
		t.Fatalf("csv:\n%s", out)
	}
	col := map[string]int{}
	for i, c := range rows[0] {
		col[c] = i
	}
	byDev := map[string][]string{}
	for _, r := range rows[1:] {
		byDev[r[0]] = r
	}
	for _, c := range []struct {
		dev, column, want string
	}{
		{"ward-a-01", "chunks_accepted", "18"}, {"ward-a-01", "chunks_lost", "2"}, {"ward-a-01", "sessions", "1"},
		{"ward-a-01", "battery_pct", "81"}, {"home-b-01", "chunks_lost", "0"}, {"home-b-01", "chunks_accepted", "20"},
		// 20 sent, 4 (5, 10, 15, 20) without SpO2
		{"home-b-01", "valid_spo2_share", "0.8000"},
		// 18 accepted (7 and 8 skipped), 4 of them (5, 10, 15, 20) without SpO2: 14/18
		{"ward-a-01", "valid_spo2_share", "0.7778"},
		{"home-b-01", "effective_sample_rate_hz", ""}, {"home-b-01", "clock_drift_ppm", ""},
	} {
		r, ok := byDev[c.dev]
		if !ok {
			t.Fatalf("no row for %s:\n%s", c.dev, out)
		}
		if got := r[col[c.column]]; got != c.want {
			t.Errorf("%s %s = %q, want %q", c.dev, c.column, got, c.want)
		}
	}
	// Every second had SQI 0.8; percentiles come from 0.01-wide bins.
	if v, err := strconv.ParseFloat(byDev["home-b-01"][col["sqi_p50"]], 64); err != nil || math.Abs(v-0.8) > 0.01 {
		t.Errorf("home-b-01 sqi_p50 = %v (%v), want 0.8 within a bin (0.01)", v, err)
	}

	code, out, errOut = runQualityCmd(t, "quality", "--gateway", a+","+b, "--device", "home-b-01", "--format", "json")
	if code != 0 {
		t.Fatalf("--device: exit %d: %s", code, errOut)
	}
	var qs []map[string]any
	if err := json.Unmarshal([]byte(out), &qs); err != nil || len(qs) != 1 || qs[0]["device_id"] != "home-b-01" || qs[0]["chunks_accepted"] != "20" {
		t.Errorf("json for one device (%v):\n%s", err, out)
	}

	code, out, _ = runQualityCmd(t, "quality", "--gateway", a)
	if code != 0 || !strings.Contains(out, "DEVICE") || !strings.Contains(out, "ward-a-02") || strings.Contains(out, "home-b-01") {
		t.Errorf("table from one gateway (exit %d):\n%s", code, out)
	}

	for _, c := range []struct {
		args     []string
		code     int
		errNames string
	}{
		{[]string{"quality", "--gateway", a, "--format", "xml"}, 2, "--format"},
		{[]string{"quality"}, 2, "--gateway"},
		{[]string{"quality", "--gateway", a + "," + b, "--device", "nobody-here"}, 1, "nobody-here"},
	} {
		code, _, errOut := runQualityCmd(t, c.args...)
		if code != c.code || !strings.Contains(errOut, c.errNames) {
			t.Errorf("%v: exit %d %q, want %d naming %s", c.args, code, errOut, c.code, c.errNames)
		}
	}
	if code, out, help := runQualityCmd(t, "quality", "--help"); code != 0 || !strings.Contains(out+help, "--device") {
		t.Errorf("--help: exit %d\n%s%s", code, out, help)
	}
}
