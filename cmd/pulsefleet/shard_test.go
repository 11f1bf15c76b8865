package main

import (
	"bytes"
	"context"
	"math"
	"net"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/gateway"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/sim"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// shardGroup runs gateways sharing one peer list on loopback, each with its
// own store. Addresses are kept across restarts so the peer list holds.
type shardGroup struct {
	t     *testing.T
	addrs []string
	dirs  []string
	stops []func()
	dbs   []*store.DB
}

func newShardGroup(t *testing.T, n int) *shardGroup {
	sg := &shardGroup{t: t}
	for i := 0; i < n; i++ {
		sg.addPeer()
	}
	return sg
}

func (sg *shardGroup) addPeer() {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		sg.t.Fatal(err)
	}
	sg.addrs = append(sg.addrs, l.Addr().String())
	l.Close()
	sg.dirs = append(sg.dirs, sg.t.TempDir())
}

func (sg *shardGroup) start() {
	t := sg.t
	sg.stops, sg.dbs = nil, nil
	for i, addr := range sg.addrs {
		db, err := store.Open(sg.dirs[i], store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		g, err := gateway.New(gateway.Options{Store: db, Peers: sg.addrs, Self: addr, BatchDelay: 5 * time.Millisecond})
		if err != nil {
			t.Fatal(err)
		}
		var l net.Listener
		for try := 0; ; try++ { // the port was ours a moment ago
			if l, err = net.Listen("tcp", addr); err == nil || try > 50 {
				break
			}
			time.Sleep(20 * time.Millisecond)
		}
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- g.Serve(ctx, l, nil) }()
		sg.dbs = append(sg.dbs, db)
		sg.stops = append(sg.stops, func() { cancel(); <-done; db.Close() })
	}
}

func (sg *shardGroup) stop() {
	for _, s := range sg.stops {
		s()
	}
	sg.stops = nil
}

// Three gateways share 200 simulated devices that all first dial the same
// one: every device ends up on exactly one shard (its rendezvous owner),
// nothing acknowledged is lost, merged queries see all devices; adding a
// fourth peer moves only about a quarter of the devices, all to the new one.
func TestThreeGatewaysShareAFleet(t *testing.T) {
	if testing.Short() {
		t.Skip("several gateways")
	}
	const devices = 200
	sg := newShardGroup(t, 3)
	sg.start()
	defer sg.stop()
	rep, err := sim.Run(context.Background(), sim.Options{Gateway: sg.addrs[0], Devices: devices, IDPrefix: "hw", Mode: sim.ModeSummary,
		Speed: 5, Duration: 2 * time.Second, Seed: 11, Start: time.Now().Add(-time.Hour)})
	if err != nil {
		t.Fatal(err)
	}
	if rep.Redirects == 0 || rep.UnackedAtEnd != 0 || rep.FramesAcked == 0 {
		t.Fatalf("simulator: redirects %d, unacked %d, acked %d", rep.Redirects, rep.UnackedAtEnd, rep.FramesAcked)
	}

	// Merged listing sees every device once.
	cf := &clientFlags{}
	devs, err := listDevices(context.Background(), cf, sg.addrs)
	if err != nil {
		t.Fatal(err)
	}
	if len(devs) != devices {
		t.Errorf("merged listing: %d devices, want %d", len(devs), devices)
	}
	// Each device's data lives on exactly one shard, its owner, and all of it.
	owner := map[string]int{}
	for i, db := range sg.dbs {
		tot, err := db.LedgerTotals()
		if err != nil {
			t.Fatal(err)
		}
		for id, lt := range tot {
			if prev, dup := owner[id]; dup {
				t.Errorf("%s stored on shards %d and %d", id, prev, i)
			}
			owner[id] = i
			if want := shard.Owner(id, sg.addrs); want != sg.addrs[i] {
				t.Errorf("%s stored on %s, its owner is %s", id, sg.addrs[i], want)
			}
			if dr := rep.PerDevice[id]; lt.Chunks < dr.FramesAcked {
				t.Errorf("%s: %d acknowledged, %d stored", id, dr.FramesAcked, lt.Chunks)
			}
		}
	}
	if len(owner) != devices {
		t.Errorf("%d devices stored, want %d", len(owner), devices)
	}
	sg.stop()

	// A fourth peer: only the devices it now owns move, and they move to it.
	sg.addPeer()
	sg.start()
	rep2, err := sim.Run(context.Background(), sim.Options{Gateway: sg.addrs[1], Devices: devices, IDPrefix: "hw", Mode: sim.ModeSummary,
		Speed: 5, Duration: 2 * time.Second, Seed: 11, Start: time.Now().Add(-30 * time.Minute)}) // after the first run's device times, not ahead of the gateway clock
	if err != nil {
		t.Fatal(err)
	}
	if rep2.UnackedAtEnd != 0 {
		t.Fatalf("second run: %d unacknowledged", rep2.UnackedAtEnd)
	}
	devs4, err := sg.dbs[3].Devices()
	if err != nil {
		t.Fatal(err)
	}
	moved := 0
	for _, d := range devs4 {
		moved++
		if o := shard.Owner(d.ID, sg.addrs[:3]); o == sg.addrs[3] {
			t.Errorf("%s was already on the new peer's address", d.ID)
		}
	}
	// A moved device's history is split between its old and new owner; the
	// trend command asks every gateway and merges.
	if len(devs4) > 0 {
		id := devs4[0].ID
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"trend", "--gateway", strings.Join(sg.addrs, ","), "--device", id, "--from", "0", "--to", "4102444800"},
			stdio{out: &out, err: &errb}); code != 0 {
			t.Fatalf("trend: exit %d: %s", code, errb.String())
		}
		trends, err := alarms.ReadTrendCSV(&out)
		if err != nil {
			t.Fatal(err)
		}
		want := rep.PerDevice[id].FramesAcked + rep2.PerDevice[id].FramesAcked
		if len(trends) != 1 || uint64(len(trends[0].Samples)) != want {
			t.Errorf("merged trend of %s: %d series, %d points; want %d (both runs)", id, len(trends), len(trends[0].Samples), want)
		}
	}
	share := float64(moved) / devices
	// Rendezvous hashing moves 1/N of the fleet to the N-th peer; 200 devices
	// give a binomial spread of about +-3 points (1 sd), so allow 4 sd.
	if math.Abs(share-0.25) > 0.12 {
		t.Errorf("%d of %d devices (%.0f %%) moved to the fourth peer, want about 25 %%", moved, devices, 100*share)
	}
	t.Logf("3 -> 4 peers: %d of %d devices moved (%.1f %%)", moved, devices, 100*share)
}
