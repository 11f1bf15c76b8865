// Package shard decides which gateway of a group owns a device, so several
// gateways can share one fleet without a home-made cluster protocol.
//
// The rule is rendezvous (highest-random-weight) hashing: every peer scores
// every device with a stable hash of (peer, device id) and the highest score
// owns the device. Every peer that knows the same peer list computes the same
// owner without talking to the others. When a peer joins, the only devices
// that move are those the new peer now wins, about 1/N of the fleet, and they
// all move TO the new peer; when a peer leaves, only its own devices move.
//
// Nouns:
//
//	Ring              a validated peer list, built once, asked per device (Owner, Rank)
//	Owner             one-shot helper over a peer slice
//	SelfFromHostname  which peer this process is, from a StatefulSet pod's hostname
//	StatefulSetPeers  the stable DNS names of N StatefulSet pods behind a headless Service
//
// In Kubernetes the gateways run as a StatefulSet (pods NAME-0 .. NAME-N-1)
// behind a headless Service, so each pod has a stable DNS name
// NAME-i.SERVICE and knows its ordinal i from its hostname. All pods must be
// given the same peer list (same strings, any order): the strings are hashed.
//
// Caveats: the hash is a fixed function of the peer strings, so renaming a
// peer (a new Service name, a port in some lists and not in others) reshuffles
// its devices. Scores are 64-bit; ties (practically never) go to the peer
// whose name sorts first, so the owner does not depend on list order. This
// package does no I/O and keeps no state besides the Ring.
package shard
