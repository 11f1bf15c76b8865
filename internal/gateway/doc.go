// Package gateway is pulsefleet's server, assembled from its parts: the gRPC
// services devices and operators use (IngestService, FleetService,
// AdminService, plus standard health checking and reflection), the HTTP
// listener (/metrics, /healthz, /readyz, and the web page of internal/web),
// scheduled backups, and the watchdog. The per-device pipeline behind
// IngestService and most of FleetService (validation, device time,
// estimation, alarms, quality, the batched store writer, live events) is
// internal/ingest; its rules (device time, delivery) are written in that
// package's documentation.
//
// The services are adapters: each checks its request, calls the pipeline,
// the store or internal/auth, and maps what they return to a gRPC status
// (connect.go for IngestService.Connect: the devices see the same codes
// and messages as before the pipeline had a package of its own). Apart from
// the guards of internal/auth, this is the only package that knows gRPC
// status codes. Dependencies run one way: cmd -> gateway -> {ingest, web,
// auth, store, shard, calibration, profiles}; ingest, web and auth never
// import gateway.
//
// Credentials, roles and the gRPC guards are in internal/auth;
// Options.Security configures them, the web sessions and the per-stream
// message rate.
//
// Ownership of goroutines: Gateway.Serve owns the gRPC and HTTP servers,
// the pipeline's writer, the watchdog and the backup timer; it stops them
// in that order's reverse when its context ends (stop accepting, flush the
// writer so each stream's last ack is due, ask the streams to end, wait at
// most Options.GracefulTimeout for them, close the writer, close nothing it
// did not open: the caller closes the store). The gRPC server runs each
// device stream in its handler goroutine, which the pipeline borrows
// (ingest.Pipeline.HandleStream).
//
// Readiness: /readyz answers 503 from a failed commit until a write commits
// again; while it fails the watchdog probes with a small write every
// second, so readiness comes back even when no device writes.
//
// Not a certified medical alarm: a research and engineering tool.
package gateway
