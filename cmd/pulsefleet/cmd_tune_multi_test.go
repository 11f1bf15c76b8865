package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// tune --gateway A,B merges the two gateways' histories per device in time
// order: its summary.csv equals tune --data on one store holding the union
// of both snapshots. Not the sum of the per-gateway runs: device "tm-0001"
// is split in time across the gateways (a failover), and an episode that
// runs over the split, the monitored time across it and the reference
// events near it are only right on the merged history; besides, the
// overlap of the two halves would be counted twice. The union store is
// built point by point, A's snapshot first: a store keeps the first value
// at a device time, as the merge keeps the first listed gateway's.
func TestTuneThroughSeveralGateways(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	a, b := startServe(t, t.TempDir()), startServe(t, t.TempDir())
	ctx, cancel := context.WithTimeout(context.Background(), 120*time.Second)
	defer cancel()
	start := time.Now().Add(-time.Hour).Truncate(time.Second)
	for _, r := range []struct {
		gw     *child
		prefix string
		start  time.Time
	}{
		{a, "ta", start}, {b, "tb", start},
		// the same device on both, its second half (and 30 s of overlap) on B
		{a, "tm", start}, {b, "tm", start.Add(60 * time.Second)},
	} {
		rep, err := sim.Run(ctx, sim.Options{Gateway: r.gw.grpcAddr, Devices: 2, IDPrefix: r.prefix, Mode: sim.ModeSummary,
			RateHz: 100, Speed: 30, Duration: 3 * time.Second, Seed: 43, Start: r.start})
		if err != nil || rep.FramesAcked < 50 || rep.StreamErrors != 0 {
			t.Fatalf("sim %s: %v %+v", r.prefix, err, rep)
		}
	}
	dir := t.TempDir()
	p := func(n string) string { return filepath.Join(dir, n) }
	mustRun := func(args ...string) string {
		t.Helper()
		code, out := runBinary(t, args...)
		if code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, out)
		}
		return out
	}
	// Both gateways quiet (the last frames written): two merged exports in
	// a row alike, so the snapshots below hold what tune's snapshots held.
	both := a.grpcAddr + "," + b.grpcAddr
	var last []byte
	for i := 0; ; i++ {
		mustRun("export", "--gateway", both, "--format", "csv", "--out", p("quiet.csv"))
		cur, err := os.ReadFile(p("quiet.csv"))
		if err != nil {
			t.Fatal(err)
		}
		if bytes.Equal(cur, last) {
			break
		}
		if i == 20 {
			t.Fatalf("the gateways' history still changes after %d exports", i)
		}
		last = cur
		time.Sleep(200 * time.Millisecond)
	}
	os.WriteFile(p("grid.yaml"), []byte("base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [0s, 30s]\n  spo2_low.limit: [88, 92]\nreference:\n  rule: {below: 92, for: 10s}\n"), 0o600)
	stderr := mustRun("tune", "--grid", p("grid.yaml"), "--gateway", both, "--out", p("live"))
	m := regexp.MustCompile(`merged 2 gateways: (\d+) devices, (\d+) held by more than one; (\d+) duplicate points`).FindStringSubmatch(stderr)
	if m == nil || m[1] != "6" || m[2] != "2" {
		t.Fatalf("stderr does not report the merge of 6 devices, 2 on both gateways:\n%s", stderr)
	}
	if n, _ := strconv.Atoi(m[3]); n == 0 {
		t.Errorf("no duplicate points reported though tm-* overlap by 30 s on both gateways:\n%s", stderr)
	}
	for _, gw := range []string{a.grpcAddr, b.grpcAddr} {
		if !strings.Contains(stderr, "snapshot "+gw) {
			t.Errorf("no snapshot progress for %s on stderr:\n%s", gw, stderr)
		}
	}

	// The union store: both snapshots restored, their points written A first.
	union, err := store.Open(p("union"), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	seen := map[string]bool{}
	for i, c := range []*child{a, b} {
		snap, data := p("snap"+strconv.Itoa(i)+".db"), p("restored"+strconv.Itoa(i))
		mustRun("backup", "--gateway", c.grpcAddr, "--out", snap)
		mustRun("restore", "--data", data, "--from", snap)
		db, err := store.Open(data, store.Options{ReadOnly: true})
		if err != nil {
			t.Fatal(err)
		}
		devs, err := db.Devices()
		if err != nil {
			t.Fatal(err)
		}
		batch := &store.Batch{}
		for _, d := range devs {
			if !seen[d.ID] {
				seen[d.ID] = true
				d.Index = 0 // numbered anew by the union store (the two snapshots' numbers overlap)
				batch.Devices = append(batch.Devices, &d)
			}
			if err := db.Trend(d.ID, 0, 1<<53, func(pt store.Point) bool { batch.Points = append(batch.Points, pt); return true }); err != nil {
				t.Fatal(err)
			}
		}
		db.Close()
		if err := union.Write(batch); err != nil {
			t.Fatal(err)
		}
	}
	union.Close()
	mustRun("export", "--gateway", both, "--format", "csv", "--out", p("after.csv"))
	if after, _ := os.ReadFile(p("after.csv")); !bytes.Equal(after, last) {
		t.Fatalf("the gateways' history changed during the test: the comparison proves nothing")
	}
	mustRun("tune", "--grid", p("grid.yaml"), "--data", p("union"), "--out", p("offline"))
	live, err1 := os.ReadFile(p("live/summary.csv"))
	offline, err2 := os.ReadFile(p("offline/summary.csv"))
	if err1 != nil || err2 != nil {
		t.Fatal(err1, err2)
	}
	if bytes.Count(live, []byte("\n")) < 5 || !bytes.Equal(live, offline) {
		t.Errorf("summary.csv through two gateways (%d bytes) differs from --data on the union (%d bytes):\n%s\n---\n%s", len(live), len(offline), live, offline)
	}

	// An unreachable second gateway fails the command, naming it.
	dead := "127.0.0.1:1"
	code, out := runBinary(t, "tune", "--grid", p("grid.yaml"), "--gateway", a.grpcAddr+","+dead, "--out", p("dead"))
	if code != 1 || !strings.Contains(out, dead) {
		t.Errorf("unreachable second gateway: exit %d, stderr %q; want exit 1 naming %s", code, out, dead)
	}
	// Reviews cannot be merged across stores: refused, saying why.
	os.WriteFile(p("rev.yaml"), []byte("base: adult-ward-pilot\nsweep:\n  spo2_low.delay: [0s, 30s]\nreference:\n  reviews: {positive: [actionable], negative: [not-actionable]}\n"), 0o600)
	code, out = runBinary(t, "tune", "--grid", p("rev.yaml"), "--gateway", a.grpcAddr+","+b.grpcAddr, "--out", p("rev"))
	if code != 1 || !strings.Contains(out, "refused with several gateways") {
		t.Errorf("reviews with two gateways: exit %d, stderr %q; want exit 1, refused with the reason", code, out)
	}
}
