// Package uplink is the device side of the pulsefleet ingest protocol for
// one device: it numbers data messages, keeps each one until the gateway
// acknowledges it as durable, resumes after a reconnect from the sequence
// number the gateway's Welcome names, follows redirects in a sharded fleet
// (and, when the gateway a redirect named is down, goes back to its own
// address and Options.Fallbacks: a fleet on etcd moves a dead gateway's
// devices to the survivors), and reconnects with exponential backoff and jitter. It is what the
// `relay` command streams through.
//
// Two pieces are shared with the simulator (package sim), whose devices keep
// their own allocation-free buffers: [Open], the introduction handshake, and
// [Backoff], the reconnect schedule.
//
// Held messages live in memory, or with a spool directory in an append-only
// file (spool.go) so that a gateway outage of minutes or a restart of the
// client loses nothing. Either store is bounded in bytes (Options.MaxBytes);
// when full, [Client.Add] waits (or, not blocking, refuses) rather than
// dropping anything already taken.
//
// Sequence rules, as ingest.proto states them: numbers start at 1 and grow by
// one per data message; an Ack through N means every message up to N is in
// the gateway's store; a message rejected as stale is one the gateway
// already holds (it counts as delivered); a message rejected as rate limited
// is resent after a pause; any other rejection is final and counted by
// reason. A client that meets the gateway for the first time with a device
// id the gateway already knows (Welcome resume point above 0 before anything
// was sent) renumbers what it holds to follow the gateway's numbering.
//
// Giving up: a refused introduction, a missing or wrong credential
// (Unauthenticated, PermissionDenied) and a spool that cannot be written
// end the client at once (Err, and Add and Wait return the reason);
// everything else (an unreachable gateway, a stream cut, a shutting-down
// gateway) is retried.
//
// Ownership: [Client.Run] owns the connection and the goroutines of each
// stream (one receives, one sends) and waits for them before it returns.
package uplink
