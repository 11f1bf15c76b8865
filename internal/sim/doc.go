// Package sim is a synthetic fleet of pulse-oximeter devices speaking the
// real pulsefleet.v1 ingest protocol over gRPC. It is the `sim` command, the
// fleet of the `demo` command and the load generator of `bench`.
//
// Each device follows a patient from a [scenario.Scenario] (scripted or
// seed-derived), sends raw red/infrared chunks made by the physical PPG
// model (package ppgmodel) or per-second summaries, keeps every chunk until
// an Ack covers it, reconnects with backoff, and resumes where the gateway's
// Welcome says: chunks at or below Welcome.resume_after_sequence are dropped
// from the resend buffer, the rest are resent in order; a Rejection as
// REJECT_REASON_STALE_SEQUENCE means the gateway already holds that chunk.
// A Redirect is followed by reconnecting to the named address. The
// introduction handshake and the reconnect schedule are package uplink's
// (Open, Backoff), shared with the relay command's single-device client.
//
// Faults can be injected: streams dropped every so often, corrupt chunks
// (out-of-range codes, mismatched lengths, absurd sample rates; each
// consumes its sequence number and is expected to be rejected), and clock
// drift per device.
//
// Cost: a device is a small struct, a PPG source and one goroutine that owns
// its stream (gRPC's Recv blocks, so each open stream needs one). Chunks are
// generated and sent by a small pool of workers, each driving its share of
// the fleet from a heap of due times; chunk buffers and their proto messages
// are recycled once acknowledged, so the steady state does not allocate per
// sample. Devices share a few gRPC connections (HTTP/2 multiplexes streams).
//
// Time: the wall clock paces sending (a device sends a chunk every
// chunk/rate seconds of device time, divided by the speed-up); device clocks
// and the patient's state follow scenario time, which is wall time since the
// start times the speed-up. A compressed run replays the past: device clocks
// start before the wall clock by what they gain over the run, so they never
// run ahead of the gateway's clock (Options.Start).
package sim
