package sim

import (
	"errors"
	"fmt"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// A gateway whose store is full ends streams with RESOURCE_EXHAUSTED
// (internal/ingest/doc.go, Delivery); the simulated device must keep growing its
// reconnect backoff then, even after a welcome, instead of hammering the
// gateway every 100 ms. A stream replaced or ended on purpose does not.
func TestBackOffOnStoreFull(t *testing.T) {
	for _, c := range []struct {
		err  error
		want bool
	}{
		{status.Error(codes.ResourceExhausted, "store full: no space left on device"), true},
		{fmt.Errorf("device w-1: %w", status.Error(codes.ResourceExhausted, "store full")), true},
		{status.Error(codes.Unavailable, "gateway shutting down; reconnect"), false},
		{status.Error(codes.Aborted, "replaced by a newer stream"), false},
		{errors.New("plain"), false},
		{nil, false},
	} {
		if got := backOffFor(c.err); got != c.want {
			t.Errorf("backOffFor(%v) = %v, want %v", c.err, got, c.want)
		}
	}
}
