// Package gateway is pulsefleet's server: the gRPC services devices and
// operators use (IngestService, FleetService, AdminService, plus standard
// health checking and reflection), the per-stream pipeline from raw samples
// or device summaries to trend points and alarm episodes, the batched store
// writer that acknowledges only what is durable, the fan-out of live events,
// and the HTTP listener (/metrics, /healthz, /readyz and the web page).
//
// It is the only package that knows gRPC status codes.
//
// Ownership of goroutines:
//   - Gateway.Serve owns the gRPC and HTTP servers, the writer and the
//     watchdog; it stops them in that order's reverse when its context ends
//     (stop accepting, let streams finish their current message, flush the
//     writer, acknowledge, close nothing it did not open: the caller closes
//     the store).
//   - Each device stream runs in the gRPC handler goroutine (receive,
//     validate, estimate, evaluate alarms, enqueue for the writer) and one
//     sender goroutine it starts and waits for (acks, rejections, pushes).
//   - The writer goroutine commits batches: one bbolt transaction per batch,
//     at most Options.BatchDelay after the first record or when
//     Options.BatchRecords records are waiting, then acknowledges.
//
// Delivery: a data message is acknowledged only after the batch that holds
// its effects (ledger record, trend points, cursor) has committed. A device
// that reconnects is told the highest durable sequence number; anything at or
// below the last accepted number is rejected as stale and never stored twice.
//
// Not a certified medical alarm: a research and engineering tool.
package gateway
