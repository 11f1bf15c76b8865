// Package pulsefleetv1 holds the gRPC API of pulsefleet (package
// pulsefleet.v1): IngestService for devices, FleetService for operators and
// the web page, AdminService for credentials, calibrations and the audit log.
//
// The .pb.go files are generated and committed. After editing a .proto file,
// regenerate from the repository root with
//
//	go generate ./proto/...
//
// which lints with buf's STANDARD rules and regenerates; buf and the protoc
// plugins come from the Go module proxy at pinned versions (no protoc needed).
package pulsefleetv1

//go:generate sh -c "cd ../.. && go run github.com/bufbuild/buf/cmd/buf@v1.75.0 lint && go run github.com/bufbuild/buf/cmd/buf@v1.75.0 breaking --against ../internal/compat/testdata/v1baseline && go run github.com/bufbuild/buf/cmd/buf@v1.75.0 generate"
