// Package web serves the gateway's web page: a fleet overview and a device page, served by the HTTP
// listener from assets embedded in the binary (no network, no framework),
// and the JSON they read, plus the login that gives the page a session.
// Every JSON handler goes through webHandler, the one place where operator
// identity is decided; the handlers call the same methods FleetService
// serves over gRPC, through the small Fleet interface the gateway satisfies,
// so their checks and audit entries are the gateway's own.
//
//	GET  /                         fleet overview (HTML): attention order, filters in the URL (docs/contracts.md)
//	GET  /device/{id}              device page (HTML); 404 with one message for an unknown device
//	GET  /ui/{file}                embedded CSS and JS (app.js, charts.js, fleet.js, device.js)
//	GET  /api/fleet                every device with active episodes; quality (unless ?quality=0) and a 30-minute SpO2 sparkline with the profile's SpO2 limits (unless ?spark=0)
//	GET  /api/device/{id}          one device, its quality figures, recent episodes and the limits of its alarm profile
//	GET  /api/device/{id}/trend    ?minutes=N&step_s=S: trend buckets ending at the device's latest point
//	GET  /api/device/{id}/raw      ?seconds=N: the newest captured raw samples (when capture is on)
//	POST /api/device/{id}/acknowledge  {"episode_id":N,"note":"..."}: acknowledge active alarms
//	POST /api/device/{id}/pause    {"duration_s":N,"reason":"..."}: pause (0 resumes) alarm announcement
//	GET  /api/events               Server-Sent Events: device changes, episode transitions, trend points
//	GET  /login, POST /login, POST /logout   the login form, a session from a token, the end of it
//
// Sessions: POST /login with form field "token" checks it like a bearer
// token (internal/auth) and sets a session cookie (HMAC-signed with a key
// made at start, HttpOnly, SameSite=Strict, Secure over TLS) that names the
// credential, so revoking the token ends the session at once. Unsafe
// requests made with the cookie must carry the session's CSRF token (the
// X-CSRF-Token header or the "csrf" form field) and pass the browser's
// cross-origin check. Requests may instead carry "Authorization: Bearer
// TOKEN" (scripts); those need no CSRF token. The page's event stream made
// with a credential ends when it is revoked, like a gRPC stream.
//
// Dependencies: internal/auth for principals and roles, the generated API
// types, store.RawCapture; never the gateway. Errors of Fleet calls carry
// gRPC status codes, which this package does not read: Config.HTTPError
// (the gateway's) maps them to HTTP statuses.
//
// JSON: the API's messages through protojson with the .proto field names
// (json.go: Proto), inside a small envelope per answer; docs/contracts.md,
// "The web page", lists it. The page orders the fleet itself with the rule
// of internal/attention.
//
// Caveats: a gateway restart makes every session cookie invalid (the key is
// new each start); the page is webui/index.html run as an html/template
// (server.go). The full /api/fleet answer (quality figures, sparklines,
// each device's profile limits) costs several times the light one, which
// is why the page asks for it once a minute (BenchmarkWebOverview5000).
//
// Not a certified medical alarm: the page says so at its top.
package web
