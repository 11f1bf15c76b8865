package tune

import (
	"testing"

	"go.uber.org/goleak"
)

// Every goroutine Run starts (workers, progress) ends before it returns.
func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }
