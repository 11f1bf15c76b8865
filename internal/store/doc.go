// Package store keeps pulsefleet's history in one embedded bbolt file behind
// domain methods: devices, trend points, the ingest ledger (ranges of
// accepted data messages), sessions, raw captures, alarm episodes and alarm
// state, the audit log, alarm profiles, calibrations, credentials, the
// enrolments of devices to study participants, the outbox of notifications
// waiting for Alertmanager, and the operators' reviews of alarm episodes.
//
// Layout (bucket paths; keys are big-endian so cursors range-scan in order).
// Every value this package encodes starts with a format version byte (the
// v* constants in db.go); three kinds are stored as given and carry none:
// the meta entries (schema version, store id), the alarm-engine snapshots
// (JSON of alarms.State, whose own "version" field alarms.Restore checks)
// and the calibration assignments (the text "name@vN").
//
//	meta                          schema version (uint32), store_id (text; also in the identity file pulsefleet.id beside the store)
//	devices/ID                    Device (JSON), written when its description changes
//	cursors/ID                    Cursor (binary): resume point and counters, written with every batch
//	recent/GEN/TIME_MS|DEVIDX     Point, the recent log (tail.go) until compacted into trend/
//	trend/ID/DAY/FIRST_TIME_MS    block of up to 240 points of one device and day: delta-coded times,
//	                              fixed-point values (trendblock.go); a release-1 store's TIME_MS -> Point
//	                              (24 bytes binary) records are read alike, in the same day buckets
//	ledger/DAY/DEVIDX|FIRST_SEQ|N  a range of one device's accepted messages (ledger.go); a release-1 store's
//	                              ARRIVAL_MS|DEVIDX|SEQ records (one per message) are read alike
//	raw/ID/DAY/FIRST_SEQ          block of up to 10 s of consecutive chunks, samples Rice-coded after a
//	                              fixed polynomial predictor, lossless (rawblock.go); a release-1 store's
//	                              SEQ -> RawCapture (32-bit samples) records are read alike
//	sessions/ID/START_MS          Session (JSON)
//	episodes/EPISODE_ID           Episode (JSON)
//	alarmstate/ID                 alarm-engine snapshot, stored as given (no version byte)
//	audit/AUDIT_ID                AuditEntry (JSON)
//	profiles/ID | "*default*"     profile YAML (after the version byte)
//	calibrations/NAME/VERSION     Calibration (JSON); calassign/TARGET -> "name@vN" (no version byte)
//	tokens/HASH                   Token (JSON; only the SHA-256 of a secret is kept)
//	enrolments/ENROLMENT_ID       Enrolment (JSON): a device's data in an interval belong to a pseudonymous participant (participants.go)
//	outbox/EPISODE_ID             OutboxEntry (JSON): a notification not yet accepted by every Alertmanager (outbox.go)
//	reviews/EPISODE_ID|REVISION   Review (JSON): an operator's review of an episode; a changed review is a new revision
//
// DAY is the number of whole days since the Unix epoch (UTC, uint32), so
// retention drops whole day buckets the way a time-series database drops
// whole blocks.
//
// Writes come in batches: Write applies a Batch in one transaction, never one
// per sample, and when it returns nil every record in it is durable (bbolt
// fsyncs on commit). No *bolt.Tx escapes the package; byte slices read inside
// a transaction are copied before it ends.
//
// A damaged file never panics out of the package: transactions run under
// a recover (damage.go) that turns bbolt's panics into a *DamagedError
// naming the file and what to do. Open runs a quick check (meta pages,
// length, freelist page, first and last records of every bucket); Verify
// (verify.go) is the full check. The identity file makes a store that
// vanished or became empty refuse to open instead of starting empty.
//
// Keep the first: stored history is never rewritten. Write does not write a
// trend point at a device time the store already holds for that device (in
// the day buckets, the recent log, or earlier in the batch); it removes it
// from Batch.Points and counts it in Batch.KeptOut (keepfirst.go). The
// gateway refuses such a resend before it gets here (the device time of a
// data message must be after Cursor.LastDeviceMS) and tells the device
// which message was refused; this is the store's own guarantee beneath
// that. Cursors written before LastDeviceMS existed read as 0 (unknown).
//
// A failed Write (a full disk, an I/O error, an injected fault) leaves the
// file as it was: bbolt writes a commit's pages first and its meta page
// last, and rolls its free list back when a commit fails. Write then also
// forgets what it handed out in the failed transaction (device indices,
// episode ids), so a batch written again draws them anew and two devices
// never share a ledger index. IsFull tells a full disk from other failures.
//
// # Delivery rule
//
// The gateway acknowledges a device's message only when the batch holding
// its effects (ledger record, trend points, cursor) committed, and after a
// batch with a device's data fails, nothing of that device accepted before
// the failure is written, acknowledged or allowed to move its cursor; the
// device resends from its last durable message. The ingest pipeline's
// writer enforces it with a per-device write epoch (internal/ingest/writer.go);
// why it holds is argued in package ingest's documentation ("Delivery").
//
// Caveats: bbolt allows one writer at a time and takes an exclusive file lock,
// so only one process opens a data directory; a second Open waits Options.Timeout
// and fails with ErrLocked.
package store
