// Package store keeps pulsefleet's history in one embedded bbolt file behind
// domain methods: devices, trend points, the ingest ledger (one record per
// accepted data message), sessions, raw captures, alarm episodes and alarm
// state, the audit log, alarm profiles, calibrations and credentials.
//
// Layout (bucket paths; keys are big-endian so cursors range-scan in order;
// every value starts with a version byte):
//
//	meta                          schema version
//	devices/ID                    Device (JSON), written when its description changes
//	cursors/ID                    Cursor (binary): resume point and counters, written with every batch
//	trend/ID/DAY/TIME_MS          Point (24 bytes binary)
//	ledger/DAY/ARRIVAL_MS|DEVIDX|SEQ  Chunk (binary), time-first so writing is appending
//	raw/ID/DAY/SEQ                RawCapture (binary)
//	sessions/ID/START_MS          Session (JSON)
//	episodes/EPISODE_ID           Episode (JSON)
//	alarmstate/ID                 opaque alarm-engine snapshot
//	audit/AUDIT_ID                AuditEntry (JSON)
//	profiles/ID | "*default*"     profile YAML
//	calibrations/NAME/VERSION     Calibration (JSON); calassign/TARGET -> "name@vN"
//	tokens/HASH                   Token (JSON; only the SHA-256 of a secret is kept)
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
// Caveats: bbolt allows one writer at a time and takes an exclusive file lock,
// so only one process opens a data directory; a second Open waits Options.Timeout
// and fails with ErrLocked.
package store
