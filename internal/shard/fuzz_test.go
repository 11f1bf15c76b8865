package shard

import (
	"fmt"
	"slices"
	"testing"
)

// Ordinal parses what it formats and rejects the rest without panicking.
func FuzzOrdinal(f *testing.F) {
	for _, s := range []string{"pulsefleet-0", "pulsefleet-12.pulsefleet-peers", "pf-east-3", "x", "-1", "a--1", "a-+1", "a-01", "a-99999999999999999999"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, host string) {
		set, n, err := Ordinal(host)
		if err != nil {
			return
		}
		if set == "" || n < 0 {
			t.Fatalf("Ordinal(%q) = %q, %d", host, set, n)
		}
		s2, n2, err := Ordinal(fmt.Sprintf("%s-%d", set, n))
		if err != nil || s2 != set || n2 != n {
			t.Fatalf("Ordinal(%q) = %q, %d; re-parse gives %q, %d, %v", host, set, n, s2, n2, err)
		}
	})
}

// A peer list ParsePeers accepts builds a Ring whose owners are its peers,
// and every peer that SelfFromHostname returns is in the list.
func FuzzParsePeers(f *testing.F) {
	for _, s := range []string{"a:1,b:1", "pulsefleet-0.p:7400 pulsefleet-1.p:7400", "", ",", "a,a", "[::1]:7400,[::2]:7400"} {
		f.Add(s, "dev-1", "pulsefleet-0")
	}
	f.Fuzz(func(t *testing.T, list, device, host string) {
		peers, err := ParsePeers(list)
		if err != nil {
			return
		}
		r, err := NewRing(peers)
		if err != nil {
			t.Fatalf("ParsePeers accepted %q but NewRing fails: %v", list, err)
		}
		if o := r.Owner(device); !slices.Contains(peers, o) {
			t.Fatalf("owner %q not in %q", o, peers)
		}
		if self, err := SelfFromHostname(host, peers); err == nil && !slices.Contains(peers, self) {
			t.Fatalf("self %q not in %q", self, peers)
		}
	})
}
