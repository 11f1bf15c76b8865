// Package compat holds the pulsefleet wire protocol to its v1 promise; it
// has no code of its own, only tests (see "Compatibility promise" in
// DEVELOPERS.md):
//
//   - buf lint (STANDARD) on proto/, buf breaking against the round-1
//     baseline (testdata/v1baseline, a verbatim copy of the .proto files as
//     released) with the rules of proto/buf.yaml, and a check that the
//     committed .pb.go files are exactly what `go generate ./proto/...`
//     produces; buf and the protoc plugins are run with `go run
//     module@version` at the versions pinned in proto/ (the Go module proxy,
//     no downloaded binaries);
//   - a table of protocol edits that the breaking check must refuse (a
//     renumbered field, a changed type, a removed enum value or RPC, ...) and
//     edits it must let through (new fields, RPCs and enum values, a field
//     retired with its number and name reserved), so the rules themselves
//     are tested;
//   - a frozen client (testdata/oldclient, built from the baseline's
//     generated code and never regenerated) run as a separate process
//     against the current gateway over gRPC on loopback: raw and summary
//     devices are acknowledged and stored exactly as the same messages sent
//     by a current client, redirects and rejections are understood, and the
//     frozen FleetService calls (list devices, trend, episodes) read what a
//     current client reads.
//
// The tests that run tools or processes are skipped with -short; when buf
// cannot be fetched they skip, or fail under PULSEFLEET_REQUIRE_TOOLS=1.
package compat
