package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"io"
	"net"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// startEpisodeGateway runs a real gateway (adult-ward-pilot: spo2_low at
// 90 % after 15 s; desaturation, a 3 % drop, after 10 s) and streams each
// device 1 s summaries: 96 %, then 30 s at 85 % (one announced spo2_low and
// one desaturation episode), then 10 s at 96 % (both end).
func startEpisodeGateway(t *testing.T, devices ...string) string {
	t.Helper()
	return startEpisodeGatewayRG(t, devices...).GRPCAddr
}

// startEpisodeGatewayRG is startEpisodeGateway returning the running gateway.
func startEpisodeGatewayRG(t *testing.T, devices ...string) *runningGateway {
	t.Helper()
	c := defaultServeConfig()
	c.Data, c.GRPCListen, c.HTTPListen, c.LogLevel, c.BatchDelay = t.TempDir(), "127.0.0.1:0", "127.0.0.1:0", "error", 5*time.Millisecond
	c.DeviceTimeRate = 1e6
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
	base := time.Now().Add(-10 * time.Minute).Truncate(time.Second).UnixMilli()
	for _, id := range devices {
		streamSummaries(t, conn, id, base, func(s uint64) float64 {
			if s >= 2 && s <= 31 {
				return 85
			}
			return 96
		}, 41)
	}
	return rg
}

// streamSummaries sends n 1 s summaries with spo2(seq) and waits for the ack of the last.
func streamSummaries(t *testing.T, conn *grpc.ClientConn, id string, baseMS int64, spo2 func(uint64) float64, n uint64) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
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
	for s := uint64(1); s <= n; s++ {
		v, q, pulse := spo2(s), 0.9, 70.0
		send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s, DeviceTimeUnixMs: baseMS + int64(s)*1000,
			Spo2Pct: &v, PulseBpm: &pulse, Quality: &q}}})
	}
	for {
		m, err := st.Recv()
		if err != nil {
			t.Fatal(err)
		}
		if m.GetAck().GetThroughSequence() >= n {
			break
		}
	}
	_ = st.CloseSend()
}

// downAddr is a loopback address nothing listens on.
func downAddr(t *testing.T) string {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	a := l.Addr().String()
	l.Close()
	return a
}

func readEpisodesCSV(t *testing.T, out string) []map[string]string {
	t.Helper()
	rows, err := csv.NewReader(strings.NewReader(afterCaution(t, "episodes CSV", out))).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(rows[0], ",") != strings.Join(episodeColumns, ",") {
		t.Fatalf("header %q, want %q", rows[0], episodeColumns)
	}
	var out2 []map[string]string
	for _, r := range rows[1:] {
		m := map[string]string{}
		for i, c := range rows[0] {
			m[c] = r[i]
		}
		out2 = append(out2, m)
	}
	return out2
}

// The review round trip on the command line, against running gateways:
// episodes of two gateways are merged; review records a label (and a
// change keeps the first as revision 1); the CSV export and the reviews
// export read it back; the audit log names it; a gateway that is down is
// named and makes the command exit 3 while the others' episodes are listed.
func TestEpisodesAndReviewCommands(t *testing.T) {
	a := startEpisodeGateway(t, "ward-a-01")
	b := startEpisodeGateway(t, "home-b-01", "home-b-02")

	code, out, errOut := runCmd("episodes", "--gateway", a+","+b, "--format", "csv")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	rows := readEpisodesCSV(t, out)
	if len(rows) != 6 {
		t.Fatalf("%d episodes, want 6 (spo2_low and desaturation per device):\n%s", len(rows), out)
	}
	var target map[string]string
	for _, r := range rows {
		if r["condition"] == "desaturation" {
			continue
		}
		// Onset at the first 85 % sample, announced 15 s later, ended at the first 96 % again (hysteresis 2: clears at 92).
		if r["condition"] != "spo2_low" || r["min_spo2_pct"] != "85.0" || r["ended"] == "" || r["review"] != "" {
			t.Errorf("episode row %v, want an ended, unreviewed spo2_low with minimum 85.0", r)
		}
		on, _ := time.Parse(time.RFC3339, r["onset"])
		an, _ := time.Parse(time.RFC3339, r["announced"])
		if d := an.Sub(on); d < 15*time.Second || d > 16*time.Second {
			t.Errorf("%s announced %v after onset, want the profile's 15 s delay", r["device"], d)
		}
		if r["device"] == "home-b-02" {
			target = r
		}
	}
	if target["gateway"] != b {
		t.Fatalf("home-b-02's episode listed under gateway %q, want %s", target["gateway"], b)
	}

	code, out, errOut = runCmd("review", "--gateway", b, "--episode", target["episode_id"], "--label", "artefact", "--note", "probe off the finger")
	if code != 0 || !strings.Contains(out, "reviewed artefact") || !strings.Contains(out, "revision 1") {
		t.Fatalf("review: exit %d, %q %q", code, out, errOut)
	}
	code, out, _ = runCmd("review", "--gateway", b, "--episode", target["episode_id"], "--label", "actionable")
	if code != 0 || !strings.Contains(out, "revision 2") {
		t.Fatalf("changed review: exit %d, %q", code, out)
	}
	code, _, errOut = runCmd("review", "--gateway", b, "--episode", target["episode_id"], "--label", "false-alarm")
	if code != 2 || !strings.Contains(errOut, `--label: "false-alarm", want one of actionable, not-actionable, artefact, unsure`) {
		t.Errorf("bad label: exit %d, %q; want 2 naming the flag and the labels", code, errOut)
	}
	code, _, errOut = runCmd("review", "--gateway", b, "--episode", "9999", "--label", "unsure")
	if code != 1 || !strings.Contains(errOut, "episode_id: 9999 is not stored") {
		t.Errorf("unknown episode: exit %d, %q", code, errOut)
	}

	_, out, _ = runCmd("episodes", "--gateway", a+","+b, "--device", "home-b-02", "--format", "csv")
	rows = readEpisodesCSV(t, out)
	rows = slices.DeleteFunc(rows, func(r map[string]string) bool { return r["condition"] != "spo2_low" })
	if len(rows) != 1 || rows[0]["review"] != "actionable" || rows[0]["review_revision"] != "2" || rows[0]["reviewer"] == "" || rows[0]["reviewed"] == "" {
		t.Errorf("episode after review: %v, want actionable, revision 2, with reviewer and time", rows)
	}
	_, out, _ = runCmd("reviews", "--gateway", b)
	hist, err := csv.NewReader(strings.NewReader(afterCaution(t, "reviews CSV", out))).ReadAll()
	if err != nil || len(hist) != 3 || hist[1][3] != "artefact" || hist[1][6] != "probe off the finger" || hist[2][3] != "actionable" || hist[2][2] != "2" {
		t.Errorf("reviews export (%v):\n%s\nwant the artefact revision with its note, then actionable", err, out)
	}
	_, out, _ = runCmd("audit", "--gateway", b, "--action", "episode.review")
	if n := strings.Count(out, "episode.review"); n != 2 || !strings.Contains(out, "artefact; note: probe off the finger") {
		t.Errorf("audit lists %d episode.review entries, want 2 with label and note:\n%s", n, out)
	}

	// A gateway that is down: the others are listed, it is named, exit 3
	// (exitIncomplete).
	down := downAddr(t)
	code, out, errOut = runCmd("episodes", "--gateway", a+","+down+","+b, "--format", "json")
	if code != exitIncomplete || !strings.Contains(errOut, "1 of 3 gateways could not be read") || !strings.Contains(errOut, "gateway "+down) {
		t.Errorf("with a gateway down: exit %d, stderr %q; want %d naming %s", code, errOut, exitIncomplete, down)
	}
	var doc struct {
		Caution    string            `json:"caution"`
		Episodes   []json.RawMessage `json:"episodes"`
		Unreadable []string          `json:"unreadable_gateways"`
	}
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatal(err)
	}
	if doc.Caution != caution.Text || len(doc.Episodes) != 6 || len(doc.Unreadable) != 1 || doc.Unreadable[0] != down {
		t.Errorf("json with a gateway down: %d episodes, unreadable %v, caution %q; want 6, [%s], the caution", len(doc.Episodes), doc.Unreadable, doc.Caution, down)
	}
	code, out, _ = runCmd("episodes", "--gateway", a+","+b)
	if code != 0 || !strings.Contains(out, "GATEWAY") || !strings.Contains(out, "actionable (rev 2)") || !strings.Contains(out, "SpO2 low") {
		t.Errorf("table: exit %d:\n%s", code, out)
	}
}
