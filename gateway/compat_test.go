package gateway

import "github.com/pulsefleet/pulsefleet/internal/auth"

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
