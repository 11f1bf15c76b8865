package gateway

import (
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// FuzzCredentials: whatever a client sends as a bearer token or a session
// cookie is refused unless it is a real credential, without panicking.
func FuzzCredentials(f *testing.F) {
	for _, s := range []string{"", "pf1_0123456789ab_AAAA", "Bearer x", strings.Repeat("a", 300), "v1.abc.123.nonce.sig", "v1..99999999999999.n.s", "\x00\xff"} {
		f.Add(s)
	}
	db, err := store.Open(f.TempDir(), store.Options{})
	if err != nil {
		f.Fatal(err)
	}
	defer db.Close()
	g, err := New(Options{Store: db})
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, v string) {
		if _, err := g.authenticateBearer(v); err == nil {
			t.Fatalf("token %q accepted with no credential issued", v)
		}
		if tok, ok := cutBearer(v); ok && len(tok) > len(v) {
			t.Fatal("cutBearer grew its input")
		}
		r := httptest.NewRequest("GET", "/", nil)
		r.Header.Set("Cookie", sessionCookie+"="+v)
		if _, err := g.sessionFrom(r); err == nil {
			t.Fatalf("session cookie %q accepted without a signature from this gateway", v)
		}
	})
}
