// Package cluster makes several gateways one fleet on etcd: membership
// under a lease, device ownership by rendezvous hashing over the live
// members, and a per-device fence so that a device is never accepted by two
// gateways at once.
//
// Membership. Each gateway (Join) puts PREFIX/members/ADDR under a lease of
// TTL DefaultTTL (3 s) that it renews every TTL/3, and watches
// PREFIX/members/. The owner of a device is the rendezvous winner (package
// shard) over the live members; every gateway computes the same owner
// without talking to the others. A gateway that dies (kill -9) stops
// renewing: etcd expires its lease at most TTL after the last renewal, its
// member key disappears, and every survivor owns its share of the dead
// gateway's devices from the watch event on (Owner changes at once; no
// operator action). A returning gateway registers, and the devices it wins
// are let go by their current gateway (their fence's lost callback ends the
// stream) and redirected to it. Close revokes the lease so a gateway that
// stops cleanly hands over at once rather than after the TTL.
//
// Fence. Before a gateway accepts a device's stream it creates
// PREFIX/fence/DEVICE (a transaction that succeeds only when the key does
// not exist) attached to its member lease, and deletes it when the stream
// ends (only the version it put: a compare on the key's mod revision). A
// gateway that finds the key held by another gateway watches it and takes
// it when it is deleted, for at most AcquireWait (2*TTL); otherwise the
// stream is refused with UNAVAILABLE and the device retries. Why a lease
// key rather than a revision check on every write: the data path (bbolt
// writes and acknowledgements) never waits for etcd; the fence costs one
// transaction per stream start and one per stream end, and a dead gateway's
// fences vanish with its lease, exactly when its membership does.
//
// Failure modes (what the fence does and does not guarantee):
//   - Gateway killed: its fences live until its lease expires (<= TTL), so
//     a device that reconnects to a survivor at once waits at most that long
//     (Acquire watches the key) and is then accepted.
//   - Gateway cut off from etcd, etcd itself fine: this gateway keeps the
//     streams it has (its devices are connected to it, not elsewhere) and
//     cannot start new ones. When its lease has expired and it reaches etcd
//     again, it learns so (LeaseNotFound), ends every stream (ErrLeaseLost)
//     and registers anew. Between the expiry and that moment a device could
//     be on a new stream at another gateway while a half-open old stream
//     lingers here; the old stream carries nothing the device still sends,
//     so no message is accepted twice through it, but the window exists.
//   - etcd down for everyone: nobody can take a fence, so current streams
//     go on everywhere (the data path does not depend on etcd); devices that
//     reconnect during the outage are refused until etcd is back.
//   - A message committed by a gateway that dies before its acknowledgement
//     reaches the device is resent to the new owner and stored there too.
//     The dead gateway, when it returns, asks every other member which of
//     its newest messages they hold (resent.go: Ask, answered by ServeHeld
//     from each store's ledger) and drops its own copy of those (HeldElsewhere;
//     internal/gateway reconcileResent), so each message is in one store.
//     Why not publish durable cursors to etcd for the new owner to skip
//     (batched, or per acknowledgement)? The messages committed after the
//     last published batch would still be stored twice unless
//     acknowledgements waited for etcd, and the data path must not depend
//     on it; the reconciliation costs one question per restart. Failure
//     modes: a gateway that never returns keeps its copies in a store
//     nobody reads (exactly once then means: in exactly one of the readable
//     stores); a member down at the moment of the question is not asked
//     (only live members are): resent copies it holds stay twice until it
//     returns and asks in turn (it drops them when they are among its own
//     newest records, else they stay: held twice, never lost); two gateways
//     that return together
//     leave out of their answers what their own pending question may drop
//     (Exclude), so both keep such a message rather than both dropping it;
//     a member whose answer etcd refuses (over its 1.5 MiB request limit:
//     about 15,000 devices held) is asked again and again, logged. Only the
//     ledger is trimmed: trend points derived from the dropped messages stay
//     (per time, not per message).
//   - Gateway killed while one of its devices is silent (stopped before or
//     with it) and never reconnects: after each membership change the new
//     owner lists the devices it owns that have a shared alarm snapshot and
//     no fence (SilentDevices) and adopts them offline, so device_offline is
//     raised there (internal/gateway silentScan, 2×TTL after the change).
//     A device slower than that to reconnect is put offline and back online
//     (its device_offline onset withdrawn before the delay). A device taken
//     out of use is retired (Retire, `pulsefleet retire`): its alarm key is
//     deleted, so nobody adopts it again, and PREFIX/retired/DEVICE tells a
//     gateway that was down or not asked to end what its own store holds of
//     it, and keeps every gateway from publishing its alarm state again (a
//     publication is a transaction conditional on the mark's absence);
//     refused while its fence is held (it streams), and undone by its next
//     fence (it streams again).
//
// Keys (PREFIX defaults to /pulsefleet/):
//
//	PREFIX/members/ADDR   value ADDR, member lease
//	PREFIX/fence/DEVICE   value ADDR of the holder, the holder's member lease
//	PREFIX/alarm/DEVICE   the device's last alarm snapshot (alarms.go), no lease
//	PREFIX/retired/DEVICE the gateway that retired it (retire.go), no lease
//	PREFIX/ask/ADDR       a returning gateway's question (resent.go), its lease
//	PREFIX/answer/ADDR/M  member M's answer to it, M's lease
package cluster
