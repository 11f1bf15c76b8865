// Package auth holds the gateway's credentials and who may do what.
//
// Credentials are bearer tokens (IssueToken; only their SHA-256 is stored,
// secrets are never logged): a device token lets one device stream as
// itself; an operator token carries a Role. Roles are ordered, each
// including the ones below it:
//
//	viewer    read devices, trends, episodes, quality, profiles, calibrations, the audit log
//	operator  also acknowledge and pause alarms
//	admin     also change alarm profiles and calibrations, manage credentials,
//	          and stream as any device (for simulators and load tests)
//
// The Authenticator keeps the store's credentials in memory (the running
// gateway holds the store, so every change goes through it with Put) and
// installs the gRPC guards (ServerOptions): while any credential exists in
// the store (revoked ones count), or Options.RequireTokens is set, every call
// needs a valid token except the standard health check and reflection. While
// none exists and RequireTokens is off, the gateway is open for development:
// calls from loopback (or in-process) peers need no token and act as
// Anonymous with every role; calls from any other address are refused. A
// token that is presented is always checked, open or not.
//
// Failures answer UNAUTHENTICATED (no, unknown or revoked credential) or
// PERMISSION_DENIED (valid credential, not allowed) and are written to the
// audit log as auth.failure and auth.denied, at most Options.AuditPerMinute
// per remote host per minute and ten times that over all hosts together;
// the next entry written for a host counts what was left out
// (pulsefleet_auth_audit_suppressed_total counts every one).
//
// Long calls made with a credential (gRPC streams, the web page's event
// stream) register with OpenStream and end when it is revoked; a device
// credential holds at most MaxDeviceStreams at once. The registry holds only
// cancel functions: this package knows nothing of the ingest pipeline, the
// web page or the gateway (it depends on store and the generated API only).
//
// Caveats: gRPC status codes appear here only in the guards and
// AuthorizeDevice; the web session cookie and CSRF checks live in the web
// code, which asks this package for principals.
package auth
