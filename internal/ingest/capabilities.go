package ingest

import (
	"strings"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Capabilities negotiate protocol behaviours beyond the v1 baseline (see
// "Compatibility promise" in DEVELOPERS.md). A device names the behaviours it
// supports in Introduction.capabilities; the Welcome names those this
// gateway will use on the stream. A behaviour that changes what either side
// must send or understand is used only when both named it, so a device built
// against the baseline (which sends no capabilities) always gets baseline
// behaviour. Names are lower-case words with dots and dashes.
const (
	maxCapabilities   = 16
	maxCapabilityLen  = 64
	capabilityCharset = "abcdefghijklmnopqrstuvwxyz0123456789.-"
)

// knownCapabilities are the behaviours this gateway implements beyond the
// baseline. None yet: a new behaviour adds its name here, documents it in
// the device protocol guide and tests both the negotiated and the baseline
// path (the frozen baseline client in package compat covers the latter).
var knownCapabilities = map[string]bool{}

// validateCapabilities checks the shape of the names a device offers; names
// this gateway does not know are valid (they are ignored, not rejected).
func validateCapabilities(names []string) *pb.Rejection {
	if len(names) > maxCapabilities {
		return invalid(0, "introduction.capabilities", "%d names, want at most %d", len(names), maxCapabilities)
	}
	for _, n := range names {
		if len(n) < 1 || len(n) > maxCapabilityLen {
			return invalid(0, "introduction.capabilities", "%q: length %d, want 1..%d", n, len(n), maxCapabilityLen)
		}
		for _, r := range n {
			if !strings.ContainsRune(capabilityCharset, r) {
				return invalid(0, "introduction.capabilities", "%q: character %q, want [a-z0-9.-]", n, r)
			}
		}
	}
	return nil
}

// negotiateCapabilities returns the offered names this gateway implements,
// in the order offered, without repeats: the Welcome's capabilities.
func negotiateCapabilities(offered []string) []string {
	var out []string
	seen := map[string]bool{}
	for _, n := range offered {
		if knownCapabilities[n] && !seen[n] {
			seen[n] = true
			out = append(out, n)
		}
	}
	return out
}
