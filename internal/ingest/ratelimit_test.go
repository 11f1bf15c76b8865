package ingest

import (
	"testing"
)

// The bucket lets a burst through, then the rate (gateway clock), never
// more than the burst after a long pause.
func TestTokenBucket(t *testing.T) {
	var b tokenBucket
	b.init(200, 400, 0)
	n := 0
	for b.allow(0) {
		n++
	}
	if n != 400 {
		t.Errorf("burst %d, want 400", n)
	}
	n = 0
	for ms := int64(1); ms <= 1000; ms++ {
		if b.allow(ms) {
			n++
		}
	}
	if n != 200 {
		t.Errorf("%d in the next second, want 200", n)
	}
	b.allow(3_600_000)
	if b.tokens > 399 {
		t.Errorf("%v tokens after an hour idle, want at most the burst", b.tokens+1)
	}
}
