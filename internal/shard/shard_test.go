package shard

import (
	"fmt"
	"hash/fnv"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"pgregory.net/rapid"
)

// ids returns n device ids shaped like a pilot fleet's (invented names).
func ids(n int) []string {
	out := make([]string, n)
	for i := range out {
		out[i] = fmt.Sprintf("ward%d-bed%03d-ox%d", i%7, i, i%3)
	}
	return out
}

func mustRing(t testing.TB, peers []string) *Ring {
	t.Helper()
	r, err := NewRing(peers)
	if err != nil {
		t.Fatal(err)
	}
	return r
}

func peers(n int) []string {
	p, err := StatefulSetPeers("pulsefleet", "pulsefleet-peers", n, 7400)
	if err != nil {
		panic(err)
	}
	return p
}

func TestEveryDeviceHasExactlyOneOwner(t *testing.T) {
	ps := peers(5)
	r := mustRing(t, ps)
	for _, id := range ids(2000) {
		owners := 0
		for _, p := range ps {
			if r.Owns(p, id) {
				owners++
			}
		}
		if owners != 1 {
			t.Fatalf("device %q has %d owners, want exactly 1", id, owners)
		}
		rank := r.Rank(id)
		if rank[0] != r.Owner(id) {
			t.Fatalf("device %q: Rank()[0] = %q, Owner = %q", id, rank[0], r.Owner(id))
		}
		sorted := slices.Clone(rank)
		slices.Sort(sorted)
		if !slices.Equal(sorted, r.Peers()) {
			t.Fatalf("device %q: Rank %q is not a permutation of the peers", id, rank)
		}
	}
}

// The defining property of rendezvous hashing: going from 3 to 4 peers moves
// about 1/4 of the devices, and every moved device moves to the new peer.
// Tolerance 25 % +- 3 % on 10,000 ids (binomial sd is 0.43 %, so 3 % is
// about 7 sd: the test does not flake, and a broken hash fails it).
func TestAddingAPeerMovesAQuarterToTheNewPeer(t *testing.T) {
	three, four := peers(3), peers(4)
	newPeer := four[3]
	r3, r4 := mustRing(t, three), mustRing(t, four)
	const n = 10_000
	moved := 0
	for _, id := range ids(n) {
		a, b := r3.Owner(id), r4.Owner(id)
		if a == b {
			continue
		}
		moved++
		if b != newPeer {
			t.Fatalf("device %q moved %q -> %q, not to the new peer %q", id, a, b, newPeer)
		}
	}
	frac := float64(moved) / n
	t.Logf("3 -> 4 peers: %d of %d devices moved (%.2f %%)", moved, n, 100*frac)
	if frac < 0.22 || frac > 0.28 {
		t.Errorf("moved %.2f %% of devices, want 25 %% +- 3 %%", 100*frac)
	}
}

// Removing a peer moves only that peer's devices; the others keep theirs.
func TestRemovingAPeerMovesOnlyItsDevices(t *testing.T) {
	four := peers(4)
	gone := four[1]
	three := slices.Delete(slices.Clone(four), 1, 2)
	r4, r3 := mustRing(t, four), mustRing(t, three)
	for _, id := range ids(10_000) {
		a, b := r4.Owner(id), r3.Owner(id)
		if a != gone && a != b {
			t.Fatalf("device %q moved %q -> %q although %q left", id, a, b, gone)
		}
		if a == gone && b != r4.Rank(id)[1] {
			t.Fatalf("device %q of the leaving peer went to %q, want its second choice %q", id, b, r4.Rank(id)[1])
		}
	}
}

// Each of N peers gets about 1/N of the devices (10,000 ids: 1/N +- 3 %).
func TestLoadIsBalanced(t *testing.T) {
	for _, n := range []int{2, 3, 5, 8} {
		r := mustRing(t, peers(n))
		count := map[string]int{}
		const total = 10_000
		for _, id := range ids(total) {
			count[r.Owner(id)]++
		}
		for _, p := range r.Peers() {
			share := float64(count[p]) / total
			if d := share - 1/float64(n); d < -0.03 || d > 0.03 {
				t.Errorf("%d peers: %s owns %.2f %% of devices, want %.2f %% +- 3 %%", n, p, 100*share, 100/float64(n))
			}
		}
	}
}

func TestOwnerIgnoresPeerOrderAndIsDeterministic(t *testing.T) {
	ps := peers(6)
	r := mustRing(t, ps)
	rng := rand.New(rand.NewPCG(1, 2))
	for trial := 0; trial < 20; trial++ {
		shuffled := slices.Clone(ps)
		rng.Shuffle(len(shuffled), func(i, j int) { shuffled[i], shuffled[j] = shuffled[j], shuffled[i] })
		r2 := mustRing(t, shuffled)
		for _, id := range ids(500) {
			if r.Owner(id) != r2.Owner(id) || Owner(id, shuffled) != r.Owner(id) {
				t.Fatalf("owner of %q depends on peer order %q", id, shuffled)
			}
		}
	}
}

// The hash is part of the wire contract between gateways of different
// versions: a change would move every device on upgrade. FNV-1a is checked
// against the standard library's implementation (hash/fnv) and the mapping
// is pinned (regression pin, computed by this implementation).
func TestHashIsStable(t *testing.T) {
	for _, s := range []string{"", "a", "pulsefleet-0.pulsefleet-peers:7400\x00ward1-bed001"} {
		h := fnv.New64a()
		h.Write([]byte(s))
		if got := fnvAdd(fnvOffset64, s); got != h.Sum64() {
			t.Errorf("fnvAdd(%q) = %#x, hash/fnv says %#x", s, got, h.Sum64())
		}
	}
	// fmix64 of 0 is 0 and it is a bijection on a sample (no collisions).
	if finish(0) != 0 {
		t.Errorf("finish(0) = %#x, want 0", finish(0))
	}
	seen := map[uint64]bool{}
	for i := uint64(1); i < 100_000; i++ {
		f := finish(i)
		if seen[f] {
			t.Fatalf("finish collides at %d", i)
		}
		seen[f] = true
	}
	// Regression pin (values computed by this implementation when the hash
	// was chosen; they must never change).
	p0 := "pulsefleet-0.pulsefleet-peers:7400"
	for _, tc := range []struct {
		id    string
		score uint64
		owner string
	}{
		{"ward1-bed001", 0xda3e312f32cc1073, "pulsefleet-0.pulsefleet-peers:7400"},
		{"ward2-bed014", 0xa41367740f84b5f4, "pulsefleet-1.pulsefleet-peers:7400"},
		{"home-07", 0x412c8d5ded31adac, "pulsefleet-2.pulsefleet-peers:7400"},
		{"ox-proto-a3", 0x3518d18e2c5ec4d6, "pulsefleet-2.pulsefleet-peers:7400"},
	} {
		if got := Score(p0, tc.id); got != tc.score {
			t.Errorf("Score(%q, %q) = %#x, pinned %#x (the hash changed: every device would move on upgrade)", p0, tc.id, got, tc.score)
		}
		if got := Owner(tc.id, peers(3)); got != tc.owner {
			t.Errorf("owner of %q = %q, pinned %q", tc.id, got, tc.owner)
		}
	}
}

func TestNewRingRejectsBadPeerLists(t *testing.T) {
	for _, tc := range []struct {
		name  string
		peers []string
		want  string
	}{
		{"empty list", nil, "at least 1 peer"},
		{"empty name", []string{"a:1", " "}, "is empty"},
		{"duplicate", []string{"a:1", "b:1", "a:1"}, `"a:1" listed twice`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := NewRing(tc.peers)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("NewRing(%q) error %v, want it to mention %q", tc.peers, err, tc.want)
			}
			if Owner("x", tc.peers) != "" {
				t.Errorf("Owner over a bad list must be empty")
			}
		})
	}
}

func TestSelfFromHostname(t *testing.T) {
	ps := peers(3)
	fq := []string{"pulsefleet-0.pulsefleet-peers.ward.svc.cluster.local:7400", "pulsefleet-1.pulsefleet-peers.ward.svc.cluster.local:7400"}
	for _, tc := range []struct {
		host  string
		peers []string
		want  string
		err   string
	}{
		{"pulsefleet-2", ps, "pulsefleet-2.pulsefleet-peers:7400", ""},
		{"pulsefleet-0.pulsefleet-peers.ward.svc.cluster.local", ps, "pulsefleet-0.pulsefleet-peers:7400", ""},
		{"pulsefleet-1", fq, fq[1], ""},
		{"pulsefleet-1", []string{"pulsefleet-1", "10.0.0.1:7400"}, "pulsefleet-1", ""},
		{"pulsefleet-3", ps, "", "matches none of the 3 peers"},
		{"pulsefleet-1", []string{"pulsefleet-1:1", "pulsefleet-1.x:2"}, "", "matches 2 peers"},
		{"", ps, "", "empty hostname"},
	} {
		got, err := SelfFromHostname(tc.host, tc.peers)
		if tc.err != "" {
			if err == nil || !strings.Contains(err.Error(), tc.err) {
				t.Errorf("SelfFromHostname(%q) = %q, %v; want error with %q", tc.host, got, err, tc.err)
			}
			continue
		}
		if err != nil || got != tc.want {
			t.Errorf("SelfFromHostname(%q) = %q, %v; want %q", tc.host, got, err, tc.want)
		}
	}
}

func TestOrdinal(t *testing.T) {
	for _, tc := range []struct {
		host string
		set  string
		ord  int
		ok   bool
	}{
		{"pulsefleet-0", "pulsefleet", 0, true},
		{"pulsefleet-12.pulsefleet-peers", "pulsefleet", 12, true},
		{"pf-east-3", "pf-east", 3, true},
		{"pulsefleet", "", 0, false},
		{"pulsefleet-", "", 0, false},
		{"-3", "", 0, false},
		{"pulsefleet-x", "", 0, false},
		{"pulsefleet--1", "", 0, false},
		{"pulsefleet-+1", "", 0, false},
	} {
		set, ord, err := Ordinal(tc.host)
		if (err == nil) != tc.ok || set != tc.set || ord != tc.ord {
			t.Errorf("Ordinal(%q) = %q, %d, %v; want %q, %d, ok=%v", tc.host, set, ord, err, tc.set, tc.ord, tc.ok)
		}
	}
}

func TestStatefulSetPeers(t *testing.T) {
	got, err := StatefulSetPeers("pulsefleet", "pulsefleet-peers", 3, 7400)
	want := []string{"pulsefleet-0.pulsefleet-peers:7400", "pulsefleet-1.pulsefleet-peers:7400", "pulsefleet-2.pulsefleet-peers:7400"}
	if err != nil || !slices.Equal(got, want) {
		t.Fatalf("got %q, %v; want %q", got, err, want)
	}
	if got, _ := StatefulSetPeers("a", "b", 1, 0); !slices.Equal(got, []string{"a-0.b"}) {
		t.Errorf("no port: %q", got)
	}
	for _, bad := range []struct {
		set, svc   string
		n, port    int
		mentioning string
	}{
		{"", "b", 1, 0, "must both be set"},
		{"a", "b", 0, 0, "replicas 0, want >= 1"},
		{"a", "b", 1, 70000, "port 70000"},
	} {
		if _, err := StatefulSetPeers(bad.set, bad.svc, bad.n, bad.port); err == nil || !strings.Contains(err.Error(), bad.mentioning) {
			t.Errorf("StatefulSetPeers%v: error %v, want %q", bad, err, bad.mentioning)
		}
	}
}

func TestParsePeers(t *testing.T) {
	got, err := ParsePeers(" a:1, b:1\nc:1 ")
	if err != nil || !slices.Equal(got, []string{"a:1", "b:1", "c:1"}) {
		t.Errorf("ParsePeers = %q, %v", got, err)
	}
	if _, err := ParsePeers("a,a"); err == nil {
		t.Errorf("duplicate peers accepted")
	}
	if _, err := ParsePeers(" , "); err == nil {
		t.Errorf("empty list accepted")
	}
}

// Properties over random peer sets and ids: the owner is a peer; adding a
// peer either keeps the owner or hands the device to the new peer; removing
// a peer that does not own a device leaves it where it is.
func TestRendezvousProperties(t *testing.T) {
	rapid.Check(t, func(t *rapid.T) {
		ps := rapid.SliceOfNDistinct(rapid.StringMatching(`[a-z0-9.-]{1,20}`), 1, 12, rapid.ID[string]).Draw(t, "peers")
		id := rapid.String().Draw(t, "device")
		r, err := NewRing(ps)
		if err != nil {
			t.Fatal(err)
		}
		owner := r.Owner(id)
		if !slices.Contains(ps, owner) {
			t.Fatalf("owner %q is not a peer", owner)
		}
		extra := rapid.StringMatching(`[A-Z]{1,8}`).Draw(t, "new peer") // upper case: never already in ps
		r2, err := NewRing(append(slices.Clone(ps), extra))
		if err != nil {
			t.Fatal(err)
		}
		if o := r2.Owner(id); o != owner && o != extra {
			t.Fatalf("adding %q moved %q from %q to %q", extra, id, owner, o)
		}
		if len(ps) > 1 {
			i := rapid.IntRange(0, len(ps)-1).Draw(t, "removed")
			if ps[i] != owner {
				r3, err := NewRing(slices.Delete(slices.Clone(ps), i, i+1))
				if err != nil {
					t.Fatal(err)
				}
				if o := r3.Owner(id); o != owner {
					t.Fatalf("removing non-owner %q moved %q from %q to %q", ps[i], id, owner, o)
				}
			}
		}
	})
}

func BenchmarkOwner(b *testing.B) {
	for _, n := range []int{3, 16} {
		b.Run(fmt.Sprintf("peers=%d", n), func(b *testing.B) {
			r := mustRing(b, peers(n))
			list := ids(1024)
			b.ReportAllocs()
			for i := 0; b.Loop(); i++ {
				_ = r.Owner(list[i&1023])
			}
		})
	}
}
