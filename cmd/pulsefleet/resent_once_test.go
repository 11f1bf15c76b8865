package main

import (
	"context"
	"slices"
	"testing"
	"time"
)

// The kill window, made to happen: a device's messages 1..10 are committed
// by its gateway, which is killed (SIGKILL) before the device read any
// acknowledgement; the device resends them, and more, to the survivor.
// When the killed gateway returns it drops its copy of all ten (the
// survivor holds them), so each message is in exactly one store.
func TestFleetOnEtcdKill9ResentMessagesHeldOnce(t *testing.T) {
	if testing.Short() {
		t.Skip("process test")
	}
	f := newEtcdFleet(t, 2)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	const id = "resent-0001"
	d, owner := openOwned(t, ctx, f.addrs[0], id, 10*time.Second)
	first := slices.Index(f.addrs, owner)
	t0 := time.Now().Add(-30 * time.Second).Truncate(time.Second).UnixMilli()
	for i := int64(0); i < 10; i++ {
		d.send(uint64(i+1), t0+i*1000, 97) // acknowledgements left unread
	}
	time.Sleep(2 * time.Second) // committed (the writer's batch delay is milliseconds)
	f.kill(first)
	dctx, stopDevice := context.WithCancel(ctx)
	d2, _ := openOwned(t, dctx, f.addrs[1-first], id, 20*time.Second)
	for i := int64(0); i < 15; i++ {
		d2.send(uint64(i+1), t0+i*1000, 97) // the device resends what it holds unacknowledged
	}
	for d2.acked < 15 {
		d2.recv()
	}
	stopDevice()
	f.start(t, first)
	f.waitMembers(2, 30*time.Second)
	if n := f.waitReconciled(t, first, 60*time.Second); n != 10 {
		t.Errorf("returning gateway dropped %d messages, want its 10 copies of what the survivor holds", n)
	}
	f.stopAll()
	dbs := f.openStores()
	count := map[uint64][]int{}
	for i, db := range dbs {
		rs, err := db.LedgerRanges()
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range rs[id] {
			for s := r[0]; s <= r[1]; s++ {
				count[s] = append(count[s], i)
			}
		}
	}
	for s := uint64(1); s <= 15; s++ {
		if len(count[s]) != 1 || count[s][0] != 1-first {
			t.Errorf("message %d held by gateways %v, want once, by the survivor %d", s, count[s], 1-first)
		}
	}
}
