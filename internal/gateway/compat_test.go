package gateway

import (
	"net/http"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
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

// Names the gateway's tests used before the per-device pipeline moved to
// internal/ingest.

const (
	clockAheadMax = ingest.ClockAheadMax
	validWindow   = ingest.ValidWindow
	maxADCBits    = ingest.MaxADCBits
	rateHoldMS    = ingest.RateHoldMS

	maxRejectsBeforeIntro = ingest.MaxRejectsBeforeIntro
)

var (
	pointProto             = ingest.TrendPointProto
	largestValidMessage    = ingest.LargestValidMessage
	defaultMaxMessageBytes = ingest.DefaultMaxMessageBytes
)
