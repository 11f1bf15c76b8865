package gateway

import (
	"testing"

	"go.uber.org/goleak"
)

// Every goroutine a test starts (servers, writers, streams, watchers) must
// be gone when the package's tests end.
func TestMain(m *testing.M) {
	goleak.VerifyTestMain(m)
}
