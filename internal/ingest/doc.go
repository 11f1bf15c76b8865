// Package ingest is the per-device pipeline of a pulsefleet gateway: what
// happens to a device's messages between the gRPC stream and the store.
// It keeps the registry of known devices (each with its cursor, alarm
// engine, clock policy and quality figures), serves each device stream
// (validate, rate-limit, admit by sequence and device time, estimate raw
// samples, evaluate alarms), writes the effects in batches through one
// writer (ledger record, trend points, raw capture, cursor, episodes, alarm
// state, audit), acknowledges only what is durable, and fans live events
// out to watchers. Operator actions on alarms and profiles go through it
// too, so that every change of an alarm engine is stored the same way.
//
// It knows no transport: no gRPC status codes and no HTTP. A stream is a
// Conn (Send and Recv of the API's messages); what ends it is returned as
// an *Error of a Kind, or as a cause (ErrReplaced, *StoreFault,
// ErrSendStalled), and internal/gateway tells the device the matching gRPC
// status. Credentials, sharding and calibration assignments come in as
// functions of Config, so the dependency runs one way: gateway -> ingest ->
// {estimator, alarms, internal/store, the generated API}.
//
// Files: pipeline.go (Pipeline, loading, store health, Tick), stream.go
// (one stream: introduction, start, finish), streamio.go (its reader and
// sender goroutines), accept.go (a data message: sequence and time rules,
// estimate, evaluate, queue), validate.go, ratelimit.go, clock.go (device
// time), quality.go, device.go (the registry), writer.go, hub.go,
// effects.go (alarm events to episodes, metrics, live events), views.go and
// operator.go (what FleetService reads and changes), errors.go, protos.go,
// fence.go (a fleet on etcd: each stream's device fence, alarm state
// carried between gateways; both optional functions of Config).
//
// Ownership of goroutines:
//   - The caller runs RunWriter in a goroutine it owns and stops it with
//     CloseWriter after every stream has ended (internal/gateway's Serve).
//     The writer commits batches: one bbolt transaction per batch,
//     Config.BatchDelay after the first record (and, under load, no sooner
//     than 4x the previous commit's duration after that one started, but
//     never paced more than 30 ms apart: writer.go, pacing) or when
//     Config.BatchRecords records are waiting, then acknowledges.
//   - Each device stream runs in the goroutine that calls HandleStream
//     (validate, estimate, evaluate alarms, queue for the writer), with a
//     reader goroutine that owns Recv and a sender goroutine that owns
//     Send, both started and owned by HandleStream. The handler makes no
//     call that waits on the device (it waits only on channels and its
//     context), so a stream replaced by a newer one of the same device
//     ends within milliseconds; it waits at most 2 s (senderDrain) for its
//     sender to deliver the answers and ack already due; the reader and the
//     sender return when the RPC ends. Answers wait in a queue of 64
//     (sendQueue); when it is full the handler waits for the sender to
//     take it (or for the stream to be cancelled), so every message is
//     answered and a device that does not read is not read from either;
//     acknowledgements are never queued: the sender sends the newest one
//     after each round. A device that stops
//     reading is cut off once one Send has been blocked for
//     Config.SendStall (20 s; Tick, which the gateway's watchdog calls every
//     second, checks).
//
// Delivery: a data message is acknowledged only after the batch that holds
// its effects (ledger record, trend points, cursor) has committed. A device
// that reconnects is told the highest durable sequence number; anything at or
// below the last accepted number is rejected as stale and never stored twice;
// so is a message whose device time is not after the last accepted one
// (Device time, below).
//
// Device time: alarms are evaluated on the device's clock (trend points,
// episodes and alarm delays are in device time), so a wrong device clock
// must neither freeze evaluation nor rewrite history, and must never pass
// silently. With IEC 60601-1-8 in mind (an alarm system must not be
// silently disabled; a technical alarm condition signals that the equipment
// cannot do its job), the pipeline applies one rule to every data message
// (raw chunk or summary), after its sequence number is found new
// (clock.go):
//
//   - Ahead: a device time more than 5 s (ClockAheadMax) ahead of the
//     gateway clock is refused: REJECT_REASON_INVALID_FIELD naming
//     *.device_time_unix_ms, how far ahead it is and the bound. Nothing of
//     the message is stored or evaluated, so no single message can push the
//     alarm engine's clock (or a stored episode) into the future.
//   - Too old: a device time more than a year behind the gateway clock is
//     refused the same way.
//   - Not after the last accepted device time of the device (a clock set
//     back, or a resend of device times already stored under new sequence
//     numbers): refused as stale, REJECT_REASON_STALE_DEVICE_TIME naming
//     *.device_time_unix_ms and the last accepted time. (Not
//     REJECT_REASON_STALE_SEQUENCE: that one tells the device the gateway
//     already holds the message, so a device would count refused data as
//     delivered.) Stored history keeps
//     the first values at a device time and is never rewritten (internal/store/doc.go,
//     "Keep the first"). The last accepted device time is part of the
//     durable cursor, so the rule holds across restarts.
//   - Lagging: within a session, a message more than 60 s (clockLagMax)
//     further behind the gateway clock than the session's least-behind
//     message means a clock that runs slow or stands still (it would stretch
//     every alarm delay). Such messages are stored and evaluated, but the
//     clock is distrusted. A resent backlog comes first in a session and
//     does not count.
//
// Every refused or distrusted message makes the technical alarm condition
// device_clock_fault ("device clock fault") present. It clears only after
// 5 s (clockClearAfter) of messages all accepted within 10 s
// (clockTrustLag) of the session's least-behind one, so a clock accepted
// only now and then cannot keep restarting its delay. Its delay and
// priority come from the profile (adult-ward-pilot: 10 s, medium); a
// profile without one gets alarms.DefaultClockFault (10 s, medium): it
// cannot be left out. The gateway times it on its own clock (mapped to
// device time, never running backwards), so it is announced while every
// message is being refused. The rule this gives, checked by a property test
// over random timestamp sequences (TestPropertyNoDeviceTimestampsSilenceLowSpO2,
// 30,000 sequences of jumps, steps, repeats, stuck, slow and fast clocks):
// no combination of device timestamps keeps a device whose SpO2 stays below
// the limit for two minutes from having spo2_low or device_clock_fault
// announced. What is not claimed: that one of them is active at every
// moment. After device_clock_fault ends, a clock that then runs slow holds
// both off for up to clockLagMax plus the fault's delay.
//
// The gateway does not re-anchor a wrong clock to its own: it cannot tell a
// real-time message from a resent one, and stamping an old value with the
// arrival time would show it as current. A device sets its clock from
// Welcome.gateway_time_unix_ms. At start-up an alarm state or cursor that
// carries a time more than ClockAheadMax ahead of the gateway clock (from a
// store written before this rule, or a gateway clock set back) is rewound
// to the gateway clock (alarms.Engine.Rewind), erring towards announcing.
//
// # Delivery
//
// Rule: a data message is acknowledged only when its own effects (ledger
// record, trend points, raw capture, cursor) committed, and after a batch
// holding data of a device fails to commit, nothing of that device accepted
// before the failure is written, acknowledged or moves its durable cursor;
// the device resends from its last durable message.
//
// Mechanism: each device has a write epoch. A data record carries the epoch
// its device was in when the handler accepted it, and the stream the epoch
// it attached in. When a batch fails, the writer, before it takes another
// record, raises the epoch of every device with data in that batch, sets
// the device's accepted position back to its durable one, and cancels its
// stream (which ends with RESOURCE_EXHAUSTED "store full" or UNAVAILABLE, so
// the device backs off and reconnects). The writer writes a data record's
// data and acknowledges it only while its epoch is the device's current
// one; the handler accepts a message only while its stream's epoch is
// current. The welcome of the next stream carries the durable position as
// the resume point.
//
// Why it holds: (1) An acknowledgement is sent only by the writer after the
// batch holding the record committed, so an acknowledged record's own
// effects are durable. (2) The records of one device reach the writer in
// the order the handler accepted them (one handler feeds a device at a time
// and a replacing stream waits until the old handler has returned), with
// increasing sequence numbers within an epoch. (3) If the batch holding
// sequence s of epoch e fails, the epoch becomes e+1 before the writer adds
// any later record, so every record of epoch e after s (queued or still to
// be submitted) is dropped, and the handler accepts nothing more on the
// epoch-e stream. Hence the committed records of an epoch are a prefix of
// what it accepted, the durable sequence never passes a failed one, and an
// acknowledgement "through n" (the largest committed sequence) covers only
// committed messages. (4) A new stream starts after a barrier (its start
// record is committed behind everything queued before it), with the
// accepted position set back to the durable one, so the failed range is
// accepted again when resent; anything at or below the durable position is
// rejected as stale and never stored twice. (5) A resend of a message that
// is accepted but not yet durable gets no answer of its own, not
// REJECT_REASON_STALE_SEQUENCE ("already held; do not resend"): if the
// original's batch fails, the next Welcome resumes before it, and a device
// that had believed the stale answer would skip it; its next message would
// be accepted across the gap and acknowledged through it. The original's
// Ack answers the resend, or its failure ends the stream. Non-data parts of a failed
// batch (descriptions, sessions, alarm episodes and states, audit entries)
// are carried into the next batch, bounded, so a full disk does not lose an
// alarm episode either.
//
// Readiness: StoreFailure reports a failed commit until a write commits
// again (the gateway's /readyz answers 503 meanwhile); ProbeStore, which the
// gateway's watchdog calls every second, tries a small write, so readiness
// comes back even when no device writes.
//
// Not a certified medical alarm: a research and engineering tool.
package ingest
