package shard

import (
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
)

// FNV-1a 64-bit parameters (FNV reference: offset basis and prime).
const (
	fnvOffset64 = 14695981039346656037
	fnvPrime64  = 1099511628211
)

// Ring is an immutable, validated peer list. Its methods are safe for
// concurrent use.
type Ring struct {
	peers []string
	seeds []uint64 // FNV-1a state after hashing peer i and a separator
}

// NewRing validates peers (non-empty, no empty or duplicate names) and
// precomputes their hash prefixes. The order of peers does not matter.
func NewRing(peers []string) (*Ring, error) {
	if len(peers) == 0 {
		return nil, errors.New("shard: peer list is empty, want at least 1 peer")
	}
	r := &Ring{peers: slices.Clone(peers), seeds: make([]uint64, len(peers))}
	slices.Sort(r.peers) // fixes the tie-break and makes the Ring order-independent
	for i, p := range r.peers {
		if strings.TrimSpace(p) == "" {
			return nil, fmt.Errorf("shard: peer %d is empty", i)
		}
		if i > 0 && r.peers[i-1] == p {
			return nil, fmt.Errorf("shard: peer %q listed twice", p)
		}
		r.seeds[i] = fnvAdd(fnvAdd(fnvOffset64, p), "\x00")
	}
	return r, nil
}

// Peers returns the peers, sorted.
func (r *Ring) Peers() []string { return slices.Clone(r.peers) }

// Len is the number of peers.
func (r *Ring) Len() int { return len(r.peers) }

// Owner returns the peer that owns deviceID: the one with the highest score.
func (r *Ring) Owner(deviceID string) string {
	best, bestScore := 0, uint64(0)
	for i, seed := range r.seeds {
		s := finish(fnvAdd(seed, deviceID))
		if i == 0 || s > bestScore { // ties keep the earlier (sorted) peer
			best, bestScore = i, s
		}
	}
	return r.peers[best]
}

// Owns reports whether peer owns deviceID.
func (r *Ring) Owns(peer, deviceID string) bool { return r.Owner(deviceID) == peer }

// Rank returns the peers in decreasing order of preference for deviceID:
// Rank(id)[0] is the owner, Rank(id)[1] the peer that takes over when the
// owner leaves, and so on.
func (r *Ring) Rank(deviceID string) []string {
	type scored struct {
		peer  string
		score uint64
	}
	s := make([]scored, len(r.peers))
	for i, seed := range r.seeds {
		s[i] = scored{r.peers[i], finish(fnvAdd(seed, deviceID))}
	}
	slices.SortStableFunc(s, func(a, b scored) int {
		switch {
		case a.score > b.score:
			return -1
		case a.score < b.score:
			return 1
		}
		return 0 // stable: sorted peer order breaks ties
	})
	out := make([]string, len(s))
	for i := range s {
		out[i] = s[i].peer
	}
	return out
}

// Score is the weight of (peer, deviceID): the FNV-1a 64 hash of the peer,
// a zero byte and the id, passed through a 64-bit finaliser so that
// neighbouring strings get unrelated scores.
func Score(peer, deviceID string) uint64 {
	return finish(fnvAdd(fnvAdd(fnvAdd(fnvOffset64, peer), "\x00"), deviceID))
}

// Owner is NewRing(peers).Owner(deviceID) for one-off use; it returns ""
// when peers is not a valid peer list. Build a Ring once for repeated use.
func Owner(deviceID string, peers []string) string {
	r, err := NewRing(peers)
	if err != nil {
		return ""
	}
	return r.Owner(deviceID)
}

func fnvAdd(h uint64, s string) uint64 {
	for i := 0; i < len(s); i++ {
		h ^= uint64(s[i])
		h *= fnvPrime64
	}
	return h
}

// finish is the 64-bit finaliser of MurmurHash3 (fmix64): full avalanche,
// so a one-byte change in the input flips about half of the score's bits.
func finish(h uint64) uint64 {
	h ^= h >> 33
	h *= 0xff51afd7ed558ccd
	h ^= h >> 33
	h *= 0xc4ceb9fe1a85ec53
	h ^= h >> 33
	return h
}

// SelfFromHostname returns the entry of peers that names this process,
// given its hostname. A StatefulSet pod's hostname is its pod name
// ("pulsefleet-2"); a peer matches when the first DNS label of its host
// part equals the hostname's first label ("pulsefleet-2.pulsefleet-peers:7400"
// or "pulsefleet-2.pulsefleet-peers.ward.svc.cluster.local:7400").
// It fails when no peer or more than one peer matches.
func SelfFromHostname(hostname string, peers []string) (string, error) {
	label := firstLabel(hostname)
	if label == "" {
		return "", errors.New("shard: empty hostname")
	}
	var found []string
	for _, p := range peers {
		if firstLabel(hostPart(p)) == label {
			found = append(found, p)
		}
	}
	switch len(found) {
	case 1:
		return found[0], nil
	case 0:
		return "", fmt.Errorf("shard: hostname %q matches none of the %d peers (want a peer whose first DNS label is %q)", hostname, len(peers), label)
	default:
		return "", fmt.Errorf("shard: hostname %q matches %d peers: %q", hostname, len(found), found)
	}
}

// Ordinal splits a StatefulSet pod name NAME-ORDINAL ("pulsefleet-2") into
// the StatefulSet name and the ordinal. Only the first DNS label is used.
func Ordinal(hostname string) (set string, ordinal int, err error) {
	label := firstLabel(hostname)
	i := strings.LastIndexByte(label, '-')
	if i <= 0 || i == len(label)-1 {
		return "", 0, fmt.Errorf("shard: hostname %q is not a StatefulSet pod name NAME-ORDINAL", hostname)
	}
	set, digits := label[:i], label[i+1:]
	if strings.HasSuffix(set, "-") { // a DNS label never ends with '-'
		return "", 0, fmt.Errorf("shard: hostname %q: StatefulSet name %q ends with '-'", hostname, set)
	}
	n, err := strconv.Atoi(digits)
	if err != nil || digits[0] < '0' || digits[0] > '9' {
		return "", 0, fmt.Errorf("shard: hostname %q: ordinal %q is not a non-negative integer", hostname, digits)
	}
	return set, n, nil
}

// StatefulSetPeers returns the stable names of the pods of a StatefulSet
// named set with replicas pods behind the headless Service service:
// "SET-i.SERVICE" (resolvable inside the namespace), with ":port" appended
// when port > 0. Every pod must be given the same list.
func StatefulSetPeers(set, service string, replicas, port int) ([]string, error) {
	if set == "" || service == "" {
		return nil, fmt.Errorf("shard: StatefulSet name %q and Service name %q must both be set", set, service)
	}
	if replicas < 1 {
		return nil, fmt.Errorf("shard: replicas %d, want >= 1", replicas)
	}
	if port < 0 || port > 65535 {
		return nil, fmt.Errorf("shard: port %d, want 0 (none) or 1..65535", port)
	}
	out := make([]string, replicas)
	for i := range out {
		out[i] = fmt.Sprintf("%s-%d.%s", set, i, service)
		if port > 0 {
			out[i] += ":" + strconv.Itoa(port)
		}
	}
	return out, nil
}

// ParsePeers splits a comma- or space-separated peer list (as given in an
// environment variable or flag) and validates it like NewRing.
func ParsePeers(s string) ([]string, error) {
	peers := strings.FieldsFunc(s, func(r rune) bool { return r == ',' || r == ' ' || r == '\n' || r == '\t' })
	if _, err := NewRing(peers); err != nil {
		return nil, err
	}
	return peers, nil
}

func hostPart(peer string) string {
	if strings.HasPrefix(peer, "[") { // [v6]:port
		if i := strings.IndexByte(peer, ']'); i > 0 {
			return peer[1:i]
		}
	}
	if i := strings.LastIndexByte(peer, ':'); i >= 0 && strings.Count(peer, ":") == 1 {
		return peer[:i]
	}
	return peer
}

func firstLabel(host string) string {
	host = strings.TrimSpace(host)
	if i := strings.IndexByte(host, '.'); i >= 0 {
		return host[:i]
	}
	return host
}
