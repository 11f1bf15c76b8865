package gateway

import (
	"fmt"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
)

// SecurityOptions configure credential enforcement and per-stream limits.
// Zero values take the defaults named below.
type SecurityOptions struct {
	// RequireTokens makes every call need a credential even while none is
	// issued (every call is then refused until one is). Set it whenever the
	// gateway serves TLS or listens beyond loopback. False means the
	// development rule above.
	RequireTokens bool
	// DeviceRate is the sustained number of messages per second one device
	// stream may send; more are rejected with REJECT_REASON_RATE_LIMITED and
	// the stream goes on. 0 means 200 (a 1000 Hz device in 25-sample chunks
	// sends 40).
	DeviceRate float64
	// DeviceBurst is how many messages a stream may send at once above the
	// rate (a device catching up after a reconnect); 0 means 400.
	DeviceBurst int
	// DeviceTimeRate bounds the device time one stream may send per second
	// of gateway time, in device seconds per second: a summary covers 1 s,
	// a raw chunk its samples over its sample rate. A device sending faster
	// than that (a resent backlog, or a device that lies about its clock) is
	// rejected with REJECT_REASON_RATE_LIMITED like one over DeviceRate. 0
	// means 30 (a backlog drains at 30 times real time; the simulator's
	// --speed 20 fits).
	DeviceTimeRate float64
	// DeviceTimeBurst is how much device time a stream may send at once
	// above DeviceTimeRate (a backlog after a reconnect); 0 means 600 s.
	DeviceTimeBurst time.Duration
	// AuthAuditPerMinute bounds audit entries for failed authentication or
	// authorization per remote host per minute; 0 means 10.
	AuthAuditPerMinute int
	// SecureCookies marks web session cookies Secure even when the request
	// did not arrive over TLS (a TLS-terminating proxy in front); requests
	// over TLS always get Secure cookies.
	SecureCookies bool
	// SessionTTL is how long a web login lasts; 0 means 12 h.
	SessionTTL time.Duration
}

func (o *SecurityOptions) setDefaults() {
	if o.DeviceRate == 0 {
		o.DeviceRate = 200
	}
	if o.DeviceBurst == 0 {
		o.DeviceBurst = 400
	}
	if o.DeviceTimeRate == 0 {
		o.DeviceTimeRate = 30
	}
	if o.DeviceTimeBurst == 0 {
		o.DeviceTimeBurst = 600 * time.Second
	}
	if o.AuthAuditPerMinute == 0 {
		o.AuthAuditPerMinute = 10
	}
	if o.SessionTTL == 0 {
		o.SessionTTL = 12 * time.Hour
	}
}

func (o SecurityOptions) validate() error {
	switch {
	case o.DeviceRate < 0 || o.DeviceRate > 1e6:
		return fmt.Errorf("gateway: SecurityOptions.DeviceRate: %v, want 0..1e6 messages/s (0 = 200)", o.DeviceRate)
	case o.DeviceBurst < 0 || o.DeviceBurst > 1e6:
		return fmt.Errorf("gateway: SecurityOptions.DeviceBurst: %d, want 0..1e6 (0 = 400)", o.DeviceBurst)
	case o.DeviceTimeRate < 0 || o.DeviceTimeRate > 1e6:
		return fmt.Errorf("gateway: SecurityOptions.DeviceTimeRate: %v, want 0..1e6 device seconds per second (0 = 30)", o.DeviceTimeRate)
	case o.DeviceTimeBurst < 0 || o.DeviceTimeBurst > 1e6*time.Second:
		return fmt.Errorf("gateway: SecurityOptions.DeviceTimeBurst: %v, want 0..1e6s (0 = 600s)", o.DeviceTimeBurst)
	case o.AuthAuditPerMinute < 0:
		return fmt.Errorf("gateway: SecurityOptions.AuthAuditPerMinute: %d, want >= 0 (0 = 10)", o.AuthAuditPerMinute)
	case o.SessionTTL < 0:
		return fmt.Errorf("gateway: SecurityOptions.SessionTTL: %v, want >= 0 (0 = 12h)", o.SessionTTL)
	}
	return nil
}

// applySecurity puts o (validated, defaults set) into effect: New calls it
// with Options.Security.
func (g *Gateway) applySecurity(o SecurityOptions) {
	g.secMu.Lock()
	g.sec = o
	g.secMu.Unlock()
	g.auth.SetOptions(auth.Options{RequireTokens: o.RequireTokens, AuditPerMinute: o.AuthAuditPerMinute})
}

// security returns the options in effect.
func (g *Gateway) security() SecurityOptions {
	g.secMu.RLock()
	defer g.secMu.RUnlock()
	return g.sec
}

// streamLimits are the per-stream limits in effect, for the ingest
// pipeline.
func (g *Gateway) streamLimits() ingest.Limits {
	sec := g.security()
	return ingest.Limits{Messages: sec.DeviceRate, Burst: sec.DeviceBurst, DeviceTime: sec.DeviceTimeRate, DeviceTimeBurst: sec.DeviceTimeBurst}
}

// AuthMode describes enforcement for the start-up message.
func (g *Gateway) AuthMode() string { return g.auth.Mode() }
