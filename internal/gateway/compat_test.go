package gateway

import (
	"net/http"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/web"
)

// Names the gateway's tests used before credentials moved to internal/auth.

// SetSecurity replaces the security options of a gateway, running or not
// (production code sets Options.Security before New).
func (g *Gateway) SetSecurity(o SecurityOptions) error {
	if err := o.validate(); err != nil {
		return err
	}
	o.setDefaults()
	g.applySecurity(o)
	return nil
}

func (g *Gateway) authenticateBearer(token string) (auth.Principal, error) {
	return g.auth.Authenticate(token)
}

var (
	cutBearer = auth.CutBearer
	isLocal   = auth.IsLocal
)

const maxDeviceStreams = auth.MaxDeviceStreams

// Names the gateway's tests used before the page moved to internal/web.

const sessionCookie = web.SessionCookie

func (g *Gateway) webCSRFToken(r *http.Request) string { return g.web.CSRFToken(r) }

func (g *Gateway) sessionFrom(r *http.Request) (struct{}, error) {
	return struct{}{}, g.web.CheckSession(r)
}

// forgetDevice (a test helper) drops a device without a stream from memory and deletes its
// labelled series, so fleet churn does not leak series. Its stored history
// stays. It reports whether the device was forgotten (false when unknown or
// connected).
func (g *Gateway) forgetDevice(id string) bool {
	g.devices.mu.Lock()
	d, ok := g.devices.m[id]
	if ok {
		d.mu.Lock()
		ok = d.stream == nil
		d.mu.Unlock()
		if ok {
			delete(g.devices.m, id)
		}
	}
	g.devices.mu.Unlock()
	if ok {
		g.m.deleteDevice(id)
	}
	return ok
}
