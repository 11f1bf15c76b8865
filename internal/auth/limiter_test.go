package auth

import (
	"fmt"
	"testing"
)

// The audit limiter's memory is bounded however many hosts fail, and all
// hosts together get a bounded number of entries (moved from the gateway's
// TestAuthFailureAuditIsRateLimited, which checks the limit end to end).
func TestAuditLimiterBounds(t *testing.T) {
	// The limiter's memory is bounded however many hosts fail.
	l := newAuditLimiter(1)
	for i := 0; i < 10*auditMaxHosts; i++ {
		l.allow(fmt.Sprintf("10.%d.%d.%d", i>>16&255, i>>8&255, i&255), 0)
	}
	if n := len(l.hosts); n > auditMaxHosts+1 {
		t.Errorf("limiter tracks %d hosts, want at most %d", n, auditMaxHosts+1)
	}
	// All hosts together: at most 10 times the per-host limit a minute.
	l = newAuditLimiter(2)
	written := 0
	for i := 0; i < 500; i++ {
		if ok, _ := l.allow(fmt.Sprintf("10.0.%d.%d", i>>8, i&255), 1000); ok {
			written++
		}
	}
	if written != auditAllHostsFactor*2 {
		t.Errorf("%d entries from 500 hosts in a minute, want %d", written, auditAllHostsFactor*2)
	}
}
