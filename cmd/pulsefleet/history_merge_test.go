package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"os/exec"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"github.com/pulsefleet/pulsefleet/internal/shard"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// streamMoving streams messages first..last of a summary device (1 s
// apart from baseMS; spo2(seq)) to addr, following a redirect to the
// device's owner as a device does, and returns the address that took them.
// The device numbers its messages on from first whatever the gateway's
// Welcome says: it has moved, its earlier messages are held elsewhere.
func streamMoving(t *testing.T, addr, id string, baseMS int64, first, last uint64, spo2 func(uint64) float64) string {
	t.Helper()
	for hop := 0; hop < 3; hop++ {
		conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
		st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
		if err == nil {
			err = st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: &pb.Introduction{DeviceId: id, Mode: pb.Mode_MODE_SUMMARY}}})
		}
		var m *pb.ConnectResponse
		if err == nil {
			m, err = st.Recv()
		}
		if err != nil {
			cancel()
			conn.Close()
			t.Fatalf("%s at %s: %v", id, addr, err)
		}
		if r := m.GetRedirect(); r != nil {
			cancel()
			conn.Close()
			addr = r.GetAddress()
			continue
		}
		if m.GetWelcome() == nil {
			t.Fatalf("%s at %s: first answer %v, want a welcome or a redirect", id, addr, m)
		}
		for s := first; s <= last; s++ {
			v, q, pulse := spo2(s), 0.9, 70.0
			if err := st.Send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s,
				DeviceTimeUnixMs: baseMS + int64(s)*1000, Spo2Pct: &v, PulseBpm: &pulse, Quality: &q}}}); err != nil {
				t.Fatal(err)
			}
		}
		for m.GetAck().GetThroughSequence() < last {
			if m, err = st.Recv(); err != nil {
				t.Fatalf("%s at %s: waiting for the ack of %d: %v", id, addr, last, err)
			}
			if rj := m.GetRejection(); rj != nil {
				t.Fatalf("%s at %s: rejected: %v", id, addr, rj)
			}
		}
		_ = st.CloseSend()
		cancel()
		conn.Close()
		return addr
	}
	t.Fatalf("%s: more than 3 redirects", id)
	return ""
}

// stopChild ends a serve process with sig and waits for it.
func stopChild(t *testing.T, c *child, sig syscall.Signal) {
	t.Helper()
	if err := c.cmd.Process.Signal(sig); err != nil {
		t.Fatal(err)
	}
	select {
	case <-c.exited:
	case <-time.After(60 * time.Second):
		t.Fatalf("serve did not exit within 60 s of %v", sig)
	}
}

// historyDoc is the JSON of episodes and audit with several gateways.
type historyDoc struct {
	Incomplete bool              `json:"incomplete"`
	Episodes   []json.RawMessage `json:"episodes"`
	Entries    []struct {
		Gateway string `json:"gateway"`
		Entry   struct {
			Action   string `json:"action"`
			DeviceID string `json:"deviceId"`
		} `json:"entry"`
	} `json:"entries"`
	Duplicates int          `json:"duplicates_dropped"`
	Gaps       *historyGaps `json:"gaps"`
}

func episodeKeys(t *testing.T, raw []json.RawMessage) []string {
	t.Helper()
	var keys []string
	for _, r := range raw {
		var it struct {
			Gateway string `json:"gateway"`
			Episode struct {
				EpisodeID string `json:"episode_id"`
				DeviceID  string `json:"device_id"`
				Condition string `json:"condition"`
				Onset     string `json:"onset_unix_ms"`
			} `json:"episode"`
		}
		if err := json.Unmarshal(r, &it); err != nil {
			t.Fatal(err)
		}
		keys = append(keys, strings.Join([]string{it.Gateway, it.Episode.EpisodeID, it.Episode.DeviceID, it.Episode.Condition, it.Episode.Onset}, "|"))
	}
	slices.Sort(keys)
	return keys
}

// exportRows reads an export CSV: its "# incomplete:" notes and its rows.
func exportRows(t *testing.T, out string) (notes []string, rows [][]string) {
	t.Helper()
	for _, l := range strings.Split(afterCaution(t, "export", out), "\n") {
		if n, ok := strings.CutPrefix(l, "# incomplete: "); ok {
			notes = append(notes, n)
		}
	}
	r := csv.NewReader(strings.NewReader(out))
	r.Comment = '#'
	all, err := r.ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	return notes, all[1:]
}

// Two real `serve` processes with a static peer list: devices stream to B
// alone, then A joins (both restarted with --peers A,B) and the devices A
// now owns move there (redirected by B), numbering their messages on. The
// merged episodes, audit and export over A,B are the union of the two
// gateways' own answers. Then B is stopped: the merged queries still
// answer with A's part, mark the gap (JSON "gaps", CSV "# incomplete:"
// lines, a FHIR OperationOutcome, stderr), name the moved devices whose
// first messages A lacks, and exit 3, from the binary too; trend too.
func TestMergedHistoryAcrossGatewaysMarksAGap(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	pA, pB := downAddr(t), downAddr(t)
	dirA, dirB := t.TempDir(), t.TempDir()
	peers := []string{pA, pB}
	var moving []string
	stay := ""
	for i := 0; len(moving) < 2 || stay == ""; i++ {
		id := fmt.Sprintf("hm-%02d", i)
		if shard.Owner(id, peers) == pA {
			if len(moving) < 2 {
				moving = append(moving, id)
			}
		} else if stay == "" {
			stay = id
		}
	}
	// 85 % in messages 2..31 and 44..73: one spo2_low and one desaturation
	// episode in each half.
	spo2 := func(s uint64) float64 {
		if (s >= 2 && s <= 31) || (s >= 44 && s <= 73) {
			return 85
		}
		return 96
	}
	base := time.Now().Add(-10 * time.Minute).Truncate(time.Second).UnixMilli()
	b := startServe(t, dirB, "--grpc-listen", pB)
	for _, id := range append([]string{stay}, moving...) {
		if got := streamMoving(t, pB, id, base, 1, 41, spo2); got != pB {
			t.Fatalf("%s streamed to %s, want %s (alone)", id, got, pB)
		}
	}
	stopChild(t, b, syscall.SIGTERM)
	list := pA + "," + pB
	b = startServe(t, dirB, "--grpc-listen", pB, "--peers", list, "--self", pB)
	startServe(t, dirA, "--grpc-listen", pA, "--peers", list, "--self", pA)
	for _, id := range append([]string{stay}, moving...) {
		want := pB
		if id != stay {
			want = pA
		}
		if got := streamMoving(t, pB, id, base, 42, 82, spo2); got != want {
			t.Fatalf("%s streamed to %s, want %s", id, got, want)
		}
	}
	// A review on each gateway, for the audit logs.
	for _, gw := range peers {
		code, out, errOut := runCmd("episodes", "--gateway", gw, "--format", "csv")
		rows := readEpisodesCSV(t, out)
		if code != 0 || len(rows) == 0 {
			t.Fatalf("episodes at %s: exit %d, %d rows: %s", gw, code, len(rows), errOut)
		}
		if code, _, errOut := runCmd("review", "--gateway", gw, "--episode", rows[0]["episode_id"], "--label", "unsure"); code != 0 {
			t.Fatalf("review at %s: %s", gw, errOut)
		}
	}

	// All up: merged = union, complete, exit 0.
	var union []json.RawMessage
	for _, gw := range peers {
		_, out, _ := runCmd("episodes", "--gateway", gw, "--format", "json")
		var d historyDoc
		if err := json.Unmarshal([]byte(out), &d); err != nil {
			t.Fatal(err)
		}
		union = append(union, d.Episodes...)
	}
	code, out, errOut := runCmd("episodes", "--gateway", list, "--format", "json")
	var d historyDoc
	if err := json.Unmarshal([]byte(out), &d); err != nil || code != 0 || d.Incomplete || d.Gaps != nil {
		t.Fatalf("merged episodes: exit %d, %v, incomplete %v: %s", code, err, d.Incomplete, errOut)
	}
	// Two SpO2 episodes per device and half: 4 for each of 3 devices (and
	// device_offline episodes when a stream's end is noticed first).
	if got, want := episodeKeys(t, d.Episodes), episodeKeys(t, union); !slices.Equal(got, want) || spo2Episodes(got) != 12 {
		t.Errorf("merged episodes (%d):\n%v\nwant the union of the gateways' (%d; 12 of SpO2):\n%v", len(got), got, len(want), want)
	}
	var unionRows [][]string
	for _, gw := range peers {
		_, out, _ := runCmd("export", "--gateway", gw, "--format", "csv")
		_, rows := exportRows(t, out)
		unionRows = append(unionRows, rows...)
	}
	code, out, errOut = runCmd("export", "--gateway", list, "--format", "csv")
	notes, rows := exportRows(t, out)
	if code != 0 || len(notes) != 0 || len(rows) != 3*82 || len(rows) != len(unionRows) {
		t.Fatalf("merged export: exit %d, notes %q, %d rows, want 0, none, %d (the union: %d): %s", code, notes, len(rows), 3*82, len(unionRows), errOut)
	}
	for i := 1; i < len(rows); i++ { // per device in time order across the move
		if rows[i][1] == rows[i-1][1] && rows[i][0] <= rows[i-1][0] {
			t.Fatalf("export row %d of %s not after the one before: %q then %q", i, rows[i][1], rows[i-1][0], rows[i][0])
		}
	}
	code, out, errOut = runCmd("trend", "--gateway", list, "--device", moving[0], "--from", "1h")
	notes, rows = exportRows(t, out)
	if code != 0 || len(notes) != 0 || len(rows) != 82 {
		t.Errorf("merged trend of %s: exit %d, notes %q, %d points, want 0, none, 82 (both halves): %s", moving[0], code, notes, len(rows), errOut)
	}
	code, out, errOut = runCmd("audit", "--gateway", list, "--action", "episode.review", "--format", "json")
	d = historyDoc{}
	if err := json.Unmarshal([]byte(out), &d); err != nil || code != 0 || len(d.Entries) != 2 || d.Entries[0].Gateway == d.Entries[1].Gateway {
		t.Fatalf("merged audit: exit %d, %v, %+v: %s", code, err, d.Entries, errOut)
	}

	// B stopped: what A holds, the gap named, exit 3.
	stopChild(t, b, syscall.SIGKILL)
	code, out, errOut = runCmd("episodes", "--gateway", list, "--format", "json")
	d = historyDoc{}
	if err := json.Unmarshal([]byte(out), &d); err != nil {
		t.Fatal(err)
	}
	if code != exitIncomplete || !d.Incomplete || d.Gaps == nil || len(d.Gaps.Unreachable) != 1 || d.Gaps.Unreachable[0].Gateway != pB {
		t.Fatalf("episodes with B down: exit %d, incomplete %v, gaps %+v; want %d, true, B unreachable\n%s", code, d.Incomplete, d.Gaps, exitIncomplete, errOut)
	}
	if n := spo2Episodes(episodeKeys(t, d.Episodes)); n != 4 {
		t.Errorf("episodes with B down: %d of SpO2, want A's 4", n)
	}
	var gapDevs []string
	for _, g := range d.Gaps.Devices {
		gapDevs = append(gapDevs, g.Device)
		if len(g.Missing) != 1 || g.Missing[0].FirstSequence != 1 || g.Missing[0].LastSequence != 41 || g.Missing[0].BeforeUnixMs != base+42_000 {
			t.Errorf("%s: missing %+v, want messages 1-41 before device time %d", g.Device, g.Missing, base+42_000)
		}
	}
	if !slices.Equal(gapDevs, moving) {
		t.Errorf("devices with history elsewhere %v, want the moved ones %v", gapDevs, moving)
	}
	for _, want := range []string{"INCOMPLETE: gateway " + pB + " could not be read", moving[0] + " (messages 1-41 before device time", "1 of 2 gateways could not be read"} {
		if !strings.Contains(errOut, want) {
			t.Errorf("episodes stderr lacks %q:\n%s", want, errOut)
		}
	}
	t.Logf("episodes with B down, stderr:\n%s", errOut)
	code, out, errOut = runCmd("episodes", "--gateway", list, "--format", "csv")
	if code != exitIncomplete || !strings.Contains(out, "# incomplete: gateway "+pB) || len(readEpisodesCSVComments(t, out)) != len(d.Episodes) {
		t.Errorf("episodes csv with B down: exit %d:\n%s\n%s", code, out, errOut)
	}

	code, out, errOut = runCmd("export", "--gateway", list, "--format", "csv")
	notes, rows = exportRows(t, out)
	if code != exitIncomplete || len(rows) != 2*41 || len(notes) < 2 || !strings.Contains(notes[0], pB) || !strings.Contains(notes[1], moving[1]) {
		t.Errorf("export with B down: exit %d, %d rows (want A's %d), notes %q\n%s", code, len(rows), 2*41, notes, errOut)
	}
	code, out, errOut = runCmd("trend", "--gateway", list, "--device", moving[0], "--from", "1h")
	notes, rows = exportRows(t, out)
	if code != exitIncomplete || len(rows) != 41 || len(notes) < 2 || !strings.Contains(notes[1], moving[0]+" (messages 1-41") ||
		!strings.Contains(errOut, "INCOMPLETE: gateway "+pB) {
		t.Errorf("trend with B down: exit %d, %d points (want A's 41), notes %q\n%s", code, len(rows), notes, errOut)
	}
	code, out, errOut = runCmd("reviews", "--gateway", list)
	notes, rows = exportRows(t, out)
	if code != exitIncomplete || len(rows) != 1 || len(notes) < 1 || !strings.Contains(notes[0], pB) {
		t.Errorf("reviews with B down: exit %d, %d rows (want A's 1), notes %q\n%s", code, len(rows), notes, errOut)
	}
	code, out, _ = runCmd("export", "--gateway", list, "--format", "fhir")
	var bundle struct {
		Entry []struct {
			Resource struct {
				ResourceType string
				Issue        []struct{ Code, Diagnostics string }
			}
		}
	}
	if err := json.Unmarshal([]byte(out), &bundle); err != nil || code != exitIncomplete || len(bundle.Entry) == 0 ||
		bundle.Entry[0].Resource.ResourceType != "OperationOutcome" || bundle.Entry[0].Resource.Issue[0].Code != "incomplete" {
		t.Errorf("fhir export with B down: exit %d, %v, want an OperationOutcome first", code, err)
	}
	code, out, errOut = runCmd("audit", "--gateway", list, "--format", "json")
	d = historyDoc{}
	if err := json.Unmarshal([]byte(out), &d); err != nil || code != exitIncomplete || !d.Incomplete || len(d.Entries) == 0 ||
		!strings.Contains(errOut, "INCOMPLETE: gateway "+pB) {
		t.Errorf("audit with B down: exit %d, %v, %d entries: %s", code, err, len(d.Entries), errOut)
	}
	for _, e := range d.Entries {
		if e.Gateway != pA {
			t.Errorf("audit with B down lists an entry of %s", e.Gateway)
		}
	}
	// The process itself exits 3.
	cmd := exec.Command(binary(t), "episodes", "--gateway", list)
	err := cmd.Run()
	var ee *exec.ExitError
	if !errors.As(err, &ee) || ee.ExitCode() != exitIncomplete {
		t.Errorf("pulsefleet episodes with B down: %v, want exit status %d", err, exitIncomplete)
	}
	// Nothing reachable: a failure, not a partial answer.
	if code, _, errOut := runCmd("episodes", "--gateway", pB); code != 1 {
		t.Errorf("episodes of B alone, down: exit %d, want 1: %s", code, errOut)
	}
}

// readEpisodesCSVComments reads the episode rows of a CSV that may carry
// comment lines.
func readEpisodesCSVComments(t *testing.T, out string) [][]string {
	t.Helper()
	r := csv.NewReader(strings.NewReader(out))
	r.Comment = '#'
	all, err := r.ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	return all[1:]
}

// spo2Episodes counts the keys (episodeKeys) of spo2_low and desaturation.
func spo2Episodes(keys []string) int {
	n := 0
	for _, k := range keys {
		if strings.Contains(k, "|spo2_low|") || strings.Contains(k, "|desaturation|") {
			n++
		}
	}
	return n
}
