package cluster

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"testing"
	"time"

	clientv3 "go.etcd.io/etcd/client/v3"

	"github.com/pulsefleet/pulsefleet/internal/etcdtest"
)

func join(t *testing.T, c *clientv3.Client, self string) *Node {
	t.Helper()
	n, err := Join(context.Background(), Config{Client: c, Self: self, Prefix: "/t/"})
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// crash stops a node without revoking its lease (kill -9 as seen by etcd).
func crash(n *Node) {
	n.stop()
	n.wg.Wait()
}

func waitFor(t *testing.T, within time.Duration, what string, ok func() bool) time.Duration {
	t.Helper()
	start := time.Now()
	for !ok() {
		if time.Since(start) > within {
			t.Fatalf("not within %v: %s", within, what)
		}
		time.Sleep(10 * time.Millisecond)
	}
	return time.Since(start)
}

func devices(n int) []string {
	out := make([]string, n)
	for i := range out {
		out[i] = fmt.Sprintf("dev-%03d", i)
	}
	return out
}

// Three members agree on every device's owner; each owns about a third.
func TestMembersAgreeOnOwners(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	ns := []*Node{join(t, c, "a:1"), join(t, c, "b:1"), join(t, c, "c:1")}
	defer func() {
		for _, n := range ns {
			n.Close()
		}
	}()
	waitFor(t, 5*time.Second, "every node sees 3 members", func() bool {
		for _, n := range ns {
			if len(n.Members()) != 3 {
				return false
			}
		}
		return true
	})
	count := map[string]int{}
	for _, id := range devices(300) {
		owners := 0
		for _, n := range ns {
			if n.Owner(id) == "" {
				owners++
				count[n.Self()]++
			}
		}
		if owners != 1 {
			t.Fatalf("device %s has %d owners, want 1", id, owners)
		}
	}
	for who, k := range count {
		if k < 60 || k > 140 { // 100 expected; binomial sd ~8
			t.Errorf("%s owns %d of 300 devices, want about 100", who, k)
		}
	}
}

// A killed member leaves within the TTL (plus a renewal period) and its
// fences with it: a survivor takes its devices.
func TestKilledMemberLeavesAndFencesFree(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	a := join(t, c, "a:1")
	var lostA sync.Map
	var aDevs []string
	for _, id := range devices(50) {
		rel, err := a.Acquire(context.Background(), id, func(err error) { lostA.Store(id, err) })
		if err != nil {
			t.Fatal(err)
		}
		_ = rel // never released: a dies holding them
		aDevs = append(aDevs, id)
	}
	b := join(t, c, "b:1")
	defer b.Close()
	waitFor(t, 5*time.Second, "both see 2 members", func() bool { return len(a.Members()) == 2 && len(b.Members()) == 2 })
	// Devices b now owns were let go by a (their streams would end).
	moved := 0
	for _, id := range aDevs {
		if b.Owner(id) == "" {
			moved++
			waitFor(t, 2*time.Second, "a loses "+id, func() bool { _, ok := lostA.Load(id); return ok })
			v, _ := lostA.Load(id)
			var me *MovedError
			if !errors.As(v.(error), &me) || me.Owner != "b:1" {
				t.Fatalf("a lost %s with %v, want a MovedError to b:1", id, v)
			}
		}
	}
	if moved == 0 {
		t.Fatal("b owns none of 50 devices")
	}
	// a has not released them (its streams still end): b waits, and gets
	// them when a dies and its lease expires.
	killed := time.Now()
	crash(a)
	var wg sync.WaitGroup
	var mu sync.Mutex
	var slowest time.Duration
	for _, id := range aDevs {
		wg.Add(1)
		go func() {
			defer wg.Done()
			// Every device is b's once a is gone from the member list.
			for {
				rel, err := b.Acquire(context.Background(), id, nil)
				var me *MovedError
				if errors.As(err, &me) {
					time.Sleep(20 * time.Millisecond)
					continue
				}
				if err != nil {
					t.Errorf("b acquires %s: %v", id, err)
					return
				}
				defer rel()
				mu.Lock()
				slowest = max(slowest, time.Since(killed))
				mu.Unlock()
				return
			}
		}()
	}
	wg.Wait()
	// Lease expiry is at most TTL after the last renewal, which was at most
	// TTL/3 before the kill; etcd checks expiries every 500 ms.
	if bound := DefaultTTL + 2*time.Second; slowest > bound {
		t.Errorf("the last device was taken %v after the kill, want within %v", slowest, bound)
	}
	t.Logf("all 50 devices of the killed member held by the survivor %v after the kill (TTL %v)", slowest.Round(time.Millisecond), DefaultTTL)
	if len(b.Members()) != 1 {
		t.Errorf("b sees members %v, want only itself", b.Members())
	}
}

// Two members never hold one device's fence at once, however starts race.
func TestFenceIsExclusive(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	a := join(t, c, "a:1")
	defer a.Close()
	id := "dev-x"
	rel, err := a.Acquire(context.Background(), id, nil)
	if err != nil {
		t.Fatal(err)
	}
	// A second member joins; pick a device it owns.
	b := join(t, c, "b:1")
	defer b.Close()
	waitFor(t, 5*time.Second, "2 members", func() bool { return len(a.Members()) == 2 && len(b.Members()) == 2 })
	rel()
	var bid string
	for _, d := range devices(100) {
		if b.Owner(d) == "" {
			bid = d
			break
		}
	}
	// a holds bid's fence as if its stream started before b joined (taken
	// directly, bypassing the owner check).
	key := a.fenceKey(bid)
	if _, err := c.Put(context.Background(), key, "a:1", clientv3.WithLease(clientv3.LeaseID(a.lease.Load()))); err != nil {
		t.Fatal(err)
	}
	b.wait = 300 * time.Millisecond
	_, err = b.Acquire(context.Background(), bid, nil)
	var he *HeldError
	if !errors.As(err, &he) || he.Holder != "a:1" {
		t.Fatalf("b acquired a fence a holds: err %v, want HeldError naming a:1", err)
	}
	// a lets go: b gets it while waiting.
	b.wait = 5 * time.Second
	go func() { time.Sleep(200 * time.Millisecond); c.Delete(context.Background(), key) }()
	rel2, err := b.Acquire(context.Background(), bid, nil)
	if err != nil {
		t.Fatalf("b after a let go: %v", err)
	}
	rel2()
	// A device a owns is refused by b with its owner.
	for _, d := range devices(100) {
		if a.Owner(d) == "" {
			_, err := b.Acquire(context.Background(), d, nil)
			var me *MovedError
			if !errors.As(err, &me) || me.Owner != "a:1" {
				t.Fatalf("b acquires a's device %s: %v, want MovedError to a:1", d, err)
			}
			break
		}
	}
}

// The same gateway taking a device again (a new stream replacing the old)
// keeps the fence even when the old stream's release runs last.
func TestReacquireOnSameGatewaySurvivesLateRelease(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	a := join(t, c, "a:1")
	defer a.Close()
	rel1, err := a.Acquire(context.Background(), "d", nil)
	if err != nil {
		t.Fatal(err)
	}
	rel2, err := a.Acquire(context.Background(), "d", nil)
	if err != nil {
		t.Fatal(err)
	}
	rel1() // late release of the replaced stream
	r, err := c.Get(context.Background(), a.fenceKey("d"))
	if err != nil || len(r.Kvs) != 1 {
		t.Fatalf("fence after the old stream's late release: %v %v, want still held", r, err)
	}
	if a.Held() != 1 {
		t.Fatalf("held %d, want 1", a.Held())
	}
	rel2()
	r, _ = c.Get(context.Background(), a.fenceKey("d"))
	if len(r.Kvs) != 0 || a.Held() != 0 {
		t.Fatalf("after the last release: %d keys, %d held, want none", len(r.Kvs), a.Held())
	}
}

// A graceful Close hands over at once (lease revoked, not expired).
func TestCloseHandsOverAtOnce(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	a, b := join(t, c, "a:1"), join(t, c, "b:1")
	defer b.Close()
	waitFor(t, 5*time.Second, "2 members", func() bool { return len(b.Members()) == 2 })
	if err := a.Close(); err != nil {
		t.Fatal(err)
	}
	d := waitFor(t, 2*time.Second, "b alone", func() bool { return len(b.Members()) == 1 })
	if d > time.Second {
		t.Errorf("b saw a leave %v after Close, want well under the TTL", d)
	}
}

// etcd stopped: current fences are kept (no stream is ended), new ones are
// refused; etcd back (its leases survive a restart): fences work again.
func TestEtcdDownKeepsFences(t *testing.T) {
	s := etcdtest.Start(t)
	c := s.Client(t)
	a := join(t, c, "a:1")
	defer a.Close()
	var lost sync.Map
	rel, err := a.Acquire(context.Background(), "d1", func(err error) { lost.Store("d1", err) })
	if err != nil {
		t.Fatal(err)
	}
	s.Stop()
	time.Sleep(2 * DefaultTTL)
	if _, ok := lost.Load("d1"); ok {
		t.Fatal("a fence was lost while etcd was down: its stream would have ended")
	}
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	_, err = a.Acquire(ctx, "d2", nil)
	cancel()
	if err == nil {
		t.Fatal("a new fence was granted while etcd was down")
	}
	s.Start()
	waitFor(t, 10*time.Second, "a new fence after etcd is back", func() bool {
		r, err := a.Acquire(context.Background(), "d2", nil)
		if err == nil {
			r()
		}
		return err == nil
	})
	rel()
}
