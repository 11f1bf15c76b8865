package main

import (
	"context"
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/cluster"
	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// failoverBound is the stated time within which every device of a killed
// gateway streams to a survivor: the member lease TTL (its fences and
// membership expire at most that long after its last renewal), plus the
// devices' reconnect backoff (100 ms growing by 1.6, a few attempts while
// the dead address refuses) and slack for a loaded 2-core test machine.
const failoverBound = cluster.DefaultTTL + 12*time.Second

// Three gateways on a real etcd, 300 raw devices; kill -9 one gateway:
// within failoverBound all its devices stream to survivors; restart it: it
// takes about a third back. Afterwards, across the three stores: every
// acknowledged message is held exactly once (the restarted gateway dropped
// its copy of the messages it had committed without its acknowledgement
// reaching the device, which resent them to a survivor: cluster package
// doc), and no device had sessions open at two gateways at once.
func TestFleetOnEtcdKill9Failover(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	const devices = 300
	f := newEtcdFleet(t, 3)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	repc := make(chan *sim.Report, 1)
	go func() {
		r, err := sim.Run(ctx, sim.Options{Gateway: f.addrs[0], Fallbacks: f.addrs[1:], Devices: devices, IDPrefix: "fo",
			Mode: sim.ModeRaw, RateHz: 25, Chunk: 25, Seed: 19, Drain: -1})
		if err != nil {
			t.Errorf("sim: %v", err)
		}
		repc <- r
	}()
	per := f.waitAllConnected(t, devices, 90*time.Second)
	for i, n := range per {
		if n < devices/6 || n > devices/2 {
			t.Errorf("gateway %d streams %d of %d devices, want about a third", i, n, devices)
		}
	}
	time.Sleep(2 * time.Second) // acknowledged traffic on every gateway

	const victim = 0
	moved := f.connected(victim)
	killedAt := time.Now()
	f.kill(victim)
	took := f.waitMovedTo(t, moved, []int{1, 2}, failoverBound)
	t.Logf("kill -9 of gateway %d: its %d devices all streaming to the survivors %v after the kill (bound %v)",
		victim, len(moved), took.Round(10*time.Millisecond), failoverBound)

	time.Sleep(2 * time.Second)
	restartedAt := time.Now()
	f.start(t, victim)
	f.waitMembers(3, 30*time.Second)
	per = f.waitAllConnected(t, devices, 60*time.Second)
	back := time.Since(restartedAt)
	if per[victim] < devices/6 {
		t.Errorf("restarted gateway streams %d of %d devices, want about a third back", per[victim], devices)
	}
	t.Logf("restarted gateway %d: %d devices back, all %d streaming %v after the restart", victim, per[victim], devices, back.Round(10*time.Millisecond))
	dropped := f.waitReconciled(t, victim, 60*time.Second)
	t.Logf("restarted gateway %d checked with the survivors: dropped its copy of %d messages they hold (%v after the restart)", victim, dropped, time.Since(restartedAt).Round(10*time.Millisecond))
	time.Sleep(2 * time.Second)
	cancel()
	rep := <-repc
	f.stopAll()
	if rep == nil {
		t.Fatal("no simulator report")
	}
	checkAcrossStores(t, f.openStores(), rep, victim, killedAt)
}

// waitReconciled waits until gateway i says every other gateway answered
// which of its newest messages they hold, and returns how many it dropped.
func (f *etcdFleet) waitReconciled(t testing.TB, i int, within time.Duration) int {
	t.Helper()
	deadline := time.Now().Add(within)
	for {
		m := scrapeMetrics(f.kids[i].httpAddr)
		if findLine(m, "pulsefleet_cluster_resent_reconciled ") == "pulsefleet_cluster_resent_reconciled 1" {
			n, _ := strconv.ParseFloat(strings.TrimPrefix(findLine(m, "pulsefleet_cluster_resent_dropped_total "), "pulsefleet_cluster_resent_dropped_total "), 64)
			return int(n)
		}
		if time.Now().After(deadline) {
			t.Fatalf("gateway %d has not checked its newest messages with the others within %v", i, within)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// waitAllConnected waits until every one of n devices streams to exactly one
// gateway and returns how many each streams.
func (f *etcdFleet) waitAllConnected(t testing.TB, n int, within time.Duration) []int {
	t.Helper()
	deadline := time.Now().Add(within)
	for {
		per := make([]int, len(f.kids))
		all := map[string]int{}
		for i := range f.kids {
			for id := range f.connected(i) {
				all[id]++
				per[i]++
			}
		}
		if len(all) == n {
			return per
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d of %d devices streaming after %v (per gateway %v)", len(all), n, within, per)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// waitMovedTo waits until every device of ids streams to one of the
// gateways to, and returns how long that took.
func (f *etcdFleet) waitMovedTo(t testing.TB, ids map[string]bool, to []int, within time.Duration) time.Duration {
	t.Helper()
	start := time.Now()
	for {
		on := map[string]bool{}
		for _, i := range to {
			for id := range f.connected(i) {
				on[id] = true
			}
		}
		missing := 0
		for id := range ids {
			if !on[id] {
				missing++
			}
		}
		if missing == 0 {
			return time.Since(start)
		}
		if time.Since(start) > within {
			t.Fatalf("%d of the killed gateway's %d devices not streaming to a survivor %v after the kill", missing, len(ids), within)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// checkAcrossStores checks the ledgers and sessions of the fleet's stores.
func checkAcrossStores(t *testing.T, dbs []*store.DB, rep *sim.Report, victim int, killedAt time.Time) {
	t.Helper()
	ranges := make([]map[string][][2]uint64, len(dbs))
	for i, db := range dbs {
		var err error
		if ranges[i], err = db.LedgerRanges(); err != nil {
			t.Fatal(err)
		}
	}
	acked, dups := 0, 0
	for id, dr := range rep.PerDevice {
		held := map[uint64][]int{}
		for i := range dbs {
			for _, r := range ranges[i][id] {
				for s := r[0]; s <= r[1]; s++ {
					held[s] = append(held[s], i)
				}
			}
		}
		for s := uint64(1); s <= dr.AckedThrough; s++ {
			if len(held[s]) == 0 {
				t.Errorf("%s: message %d acknowledged but in no store", id, s)
			}
		}
		acked += int(dr.AckedThrough)
		for s, where := range held {
			if len(where) < 2 {
				continue
			}
			dups++
			sort.Ints(where)
			if dups <= 20 {
				t.Errorf("%s: message %d held %d times, by gateways %v (killed: %d)", id, s, len(where), where, victim)
			}
		}
		checkSessions(t, dbs, id, victim, killedAt)
	}
	if acked == 0 {
		t.Fatal("nothing acknowledged: the test proved nothing")
	}
	if dups > 0 {
		t.Errorf("%d messages held more than once across the stores, want none", dups)
	}
	t.Logf("%d messages acknowledged, each held exactly once across the %d stores", acked, len(dbs))
}

// checkSessions fails when a device had sessions open at two gateways at
// once. A session the killed gateway left open ended at the kill at the
// latest.
func checkSessions(t *testing.T, dbs []*store.DB, id string, victim int, killedAt time.Time) {
	t.Helper()
	type span struct {
		gw         int
		start, end int64
	}
	var spans []span
	for i, db := range dbs {
		ss, err := db.SessionsSince(id, 0)
		if err != nil {
			t.Fatal(err)
		}
		for _, s := range ss {
			end := s.EndMS
			if end == 0 {
				end = math.MaxInt64
			}
			if i == victim && s.StartMS < killedAt.UnixMilli() {
				end = min(end, killedAt.UnixMilli())
			}
			spans = append(spans, span{i, s.StartMS, end})
		}
	}
	sort.Slice(spans, func(a, b int) bool { return spans[a].start < spans[b].start })
	for a := range spans {
		for b := a + 1; b < len(spans) && spans[b].start < spans[a].end; b++ {
			if spans[a].gw != spans[b].gw {
				t.Errorf("%s: streaming to gateways %d and %d at once (sessions %s and %s)", id, spans[a].gw, spans[b].gw,
					fmtSpan(spans[a].start, spans[a].end), fmtSpan(spans[b].start, spans[b].end))
				return
			}
		}
	}
}

func fmtSpan(a, b int64) string {
	if b == math.MaxInt64 {
		return fmt.Sprintf("[%d, open)", a)
	}
	return fmt.Sprintf("[%d, %d)", a, b)
}

// BenchmarkFailover: three gateways on a real etcd, N summary devices
// (summaries keep the estimator's CPU out of the figure on a small
// machine); kill -9 the gateway that streams the most: reported is the time
// from the kill to the last of its devices streaming to a survivor
// (observed by scraping the survivors every 50 ms), and how many devices
// moved. One fleet per iteration; run with -benchtime=1x.
func BenchmarkFailover(b *testing.B) {
	for _, n := range []int{300, 3000} {
		b.Run(fmt.Sprintf("devices=%d", n), func(b *testing.B) {
			var total time.Duration
			moved := 0
			for i := 0; i < b.N; i++ {
				b.StopTimer()
				d, m := failoverOnce(b, n)
				b.StartTimer()
				total += d
				moved += m
			}
			b.ReportMetric(total.Seconds()/float64(b.N), "s-to-last-device")
			b.ReportMetric(float64(moved)/float64(b.N), "devices-moved")
			b.ReportMetric(0, "ns/op")
		})
	}
}

func failoverOnce(b *testing.B, n int) (time.Duration, int) {
	f := newEtcdFleet(b, 3)
	defer f.stopAll()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() {
		defer close(done)
		_, _ = sim.Run(ctx, sim.Options{Gateway: f.addrs[0], Fallbacks: f.addrs[1:], Devices: n, IDPrefix: "bf", Mode: sim.ModeSummary, Seed: 3, Drain: -1})
	}()
	defer func() { cancel(); <-done }()
	per := f.waitAllConnected(b, n, 5*time.Minute)
	victim := 0
	for i := range per {
		if per[i] > per[victim] {
			victim = i
		}
	}
	moved := f.connected(victim)
	f.kill(victim)
	var to []int
	for i := range f.kids {
		if i != victim {
			to = append(to, i)
		}
	}
	return f.waitMovedTo(b, moved, to, 5*time.Minute), len(moved)
}
