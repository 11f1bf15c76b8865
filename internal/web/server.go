package web

import (
	"context"
	"crypto/rand"
	"embed"
	"fmt"
	"html/template"
	"io/fs"
	"net/http"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Fleet is what the page reads and changes: the FleetService calls it
// needs (the gateway's own, with their checks and audit entries), raw
// captures, live events and the gateway clock.
type Fleet interface {
	ListDevices(context.Context, *pb.ListDevicesRequest) (*pb.ListDevicesResponse, error)
	GetDevice(context.Context, *pb.GetDeviceRequest) (*pb.GetDeviceResponse, error)
	ListDeviceQuality(context.Context, *pb.ListDeviceQualityRequest) (*pb.ListDeviceQualityResponse, error)
	GetDeviceQuality(context.Context, *pb.GetDeviceQualityRequest) (*pb.GetDeviceQualityResponse, error)
	ListEpisodes(context.Context, *pb.ListEpisodesRequest) (*pb.ListEpisodesResponse, error)
	QueryTrend(context.Context, *pb.QueryTrendRequest) (*pb.QueryTrendResponse, error)
	AcknowledgeAlarm(context.Context, *pb.AcknowledgeAlarmRequest) (*pb.AcknowledgeAlarmResponse, error)
	PauseAlarms(context.Context, *pb.PauseAlarmsRequest) (*pb.PauseAlarmsResponse, error)
	ListReviews(context.Context, *pb.ListReviewsRequest) (*pb.ListReviewsResponse, error)
	ReviewEpisode(context.Context, *pb.ReviewEpisodeRequest) (*pb.ReviewEpisodeResponse, error)

	// AlarmProfile returns the alarm profile in force for a device (never
	// nil without an error) and its origin, "device" or "default", as
	// GetAlarmProfile does; the page only reads it.
	AlarmProfile(deviceID string) (*alarms.Profile, string, error)
	// RawCaptures calls fn with the device's captured raw chunks between
	// fromMS and toMS (device time) in order, until fn returns false.
	RawCaptures(deviceID string, fromMS, toMS int64, fn func(store.RawCapture) bool) error
	// Watch subscribes to live events of devices (all when empty), trend
	// points only when points; the channel holds buffer events, beyond which
	// the slow watcher's events are dropped. cancel ends the subscription.
	Watch(devices []string, points bool, buffer int) (events <-chan *pb.WatchEventsResponse, cancel func())
	// Stopping reports that the gateway shuts down (event streams end).
	Stopping() bool
	// NowMS is the gateway clock.
	NowMS() int64
	// Participants maps each device enrolled at atMS to its study
	// participant (pseudonymous id); devices without one are absent.
	Participants(atMS int64) (map[string]string, error)
}

// SessionOptions configure the session cookie.
type SessionOptions struct {
	// TTL is how long a web login lasts.
	TTL time.Duration
	// SecureCookies marks cookies Secure even when the request did not
	// arrive over TLS (a TLS-terminating proxy in front); requests over TLS
	// always get Secure cookies.
	SecureCookies bool
}

// Config wires the web page to its gateway.
type Config struct {
	Fleet Fleet
	Auth  *auth.Authenticator
	// Sessions returns the session options in effect (read per request).
	Sessions func() SessionOptions
	// Audit writes one audit entry (logins).
	Audit func(ctx context.Context, actor, action, device, detail, remote string)
	// HTTPError maps an error of a Fleet call to an HTTP status and the
	// message the client sees; nil answers 500 with the error's text.
	HTTPError func(error) (status int, message string)
	// Enrolments enrols devices to study participants from the device page
	// (participants.go); nil leaves the page without the control.
	Enrolments Enrolments
}

// Server serves the page, its JSON and the login.
type Server struct {
	cfg        Config
	fleet      Fleet
	auth       *auth.Authenticator
	sessionKey []byte // HMAC key of web sessions; new each start
}

// New makes the web server of one gateway run.
func New(cfg Config) *Server {
	s := &Server{cfg: cfg, fleet: cfg.Fleet, auth: cfg.Auth, sessionKey: make([]byte, 32)}
	_, _ = rand.Read(s.sessionKey)
	return s
}

// Error is an error with the HTTP status it answers.
type Error struct {
	Status  int
	Message string
}

func (e *Error) Error() string { return e.Message }

//go:embed webui
var webAssets embed.FS

// pageTemplate is webui/index.html as an html/template: its placeholders
// {{CAUTION}}, {{CSRF}}, {{ACTOR}} and {{MISSING}} are the fields of pageData, filled in
// and escaped for their context (text or attribute) on every request. The
// file keeps the bare names so that a page served without filling them in
// shows that it was (the tests look for "{{CSRF}}").
var pageTemplate, pageErr = parsePage()

type pageData struct{ CAUTION, CSRF, ACTOR, MISSING string }

func parsePage() (*template.Template, error) {
	b, err := webAssets.ReadFile("webui/index.html")
	if err != nil {
		return nil, err
	}
	src := strings.NewReplacer("{{CAUTION}}", "{{.CAUTION}}", "{{CSRF}}", "{{.CSRF}}", "{{ACTOR}}", "{{.ACTOR}}", "{{MISSING}}", "{{.MISSING}}").Replace(string(b))
	return template.New("index.html").Parse(src)
}

// webCaution is shown at the top of every page.
const webCaution = caution.Text

// Routes mounts the page, its JSON and the login (session.go) on mux. The
// page and every JSON read need the viewer role; acknowledging and pausing
// need the operator role (on an open loopback gateway, without tokens,
// everyone is an anonymous admin; see internal/auth).
func (s *Server) Routes(mux *http.ServeMux) {
	ui, _ := fs.Sub(webAssets, "webui")
	page := http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if pageErr != nil {
			http.Error(w, "page missing from this build: "+pageErr.Error(), http.StatusInternalServerError)
			return
		}
		w.Header().Set("Content-Type", "text/html; charset=utf-8")
		pageHeaders(w)
		data := pageData{CAUTION: webCaution, CSRF: s.CSRFToken(r), ACTOR: auth.ActorFrom(webActor(r))}
		if id := r.PathValue("id"); id != "" {
			// An unknown device's page answers 404 and says so once (the
			// script shows only that message, no empty panels).
			if _, err := s.fleet.GetDevice(r.Context(), &pb.GetDeviceRequest{DeviceId: id}); err != nil {
				code, msg := http.StatusInternalServerError, err.Error()
				if s.cfg.HTTPError != nil {
					code, msg = s.cfg.HTTPError(err)
				}
				switch code {
				case http.StatusNotFound:
					data.MISSING = fmt.Sprintf("No device %q is known to this gateway.", id)
				case http.StatusBadRequest:
					data.MISSING = fmt.Sprintf("%q is not a device id: %s.", id, msg)
				}
				if data.MISSING != "" {
					w.WriteHeader(code)
				}
			}
		}
		_ = pageTemplate.Execute(w, data)
	})
	s.authRoutes(mux)
	mux.Handle("GET /{$}", s.requireRole(auth.RoleViewer, page))
	mux.Handle("GET /device/{id}", s.requireRole(auth.RoleViewer, page))
	// The page's assets need the viewer role like the page, carry the same
	// headers, and never include the page's template (index.html, with its
	// placeholders), which only the page handler serves, filled in.
	assets := http.StripPrefix("/ui/", http.FileServerFS(ui))
	mux.Handle("GET /ui/", s.requireRole(auth.RoleViewer, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		pageHeaders(w)
		if name := strings.TrimPrefix(r.URL.Path, "/ui/"); name == "" || name == "index.html" || strings.HasSuffix(name, "/") {
			http.NotFound(w, r)
			return
		}
		assets.ServeHTTP(w, r)
	})))

	mux.Handle("GET /api/fleet", s.webHandler(auth.RoleViewer, s.webFleet))
	mux.Handle("GET /api/device/{id}", s.webHandler(auth.RoleViewer, s.webDevice))
	mux.Handle("GET /api/device/{id}/trend", s.webHandler(auth.RoleViewer, s.webTrend))
	mux.Handle("GET /api/device/{id}/raw", s.webHandler(auth.RoleViewer, s.webRaw))
	mux.Handle("POST /api/device/{id}/acknowledge", s.webHandler(auth.RoleOperator, s.webAcknowledge))
	mux.Handle("POST /api/device/{id}/pause", s.webHandler(auth.RoleOperator, s.webPause))
	mux.Handle("GET /api/events", s.webHandler(auth.RoleViewer, s.webEvents))
	s.reviewRoutes(mux)      // reviews.go
	s.participantRoutes(mux) // participants.go
}

// pageHeaders sets the security headers of the page and its assets: no
// caching, a content security policy allowing only this origin's own
// scripts, styles and connections and no framing, and no content sniffing.
func pageHeaders(w http.ResponseWriter) {
	w.Header().Set("Cache-Control", "no-store")
	w.Header().Set("Content-Security-Policy", "default-src 'self'; img-src 'self' data:; style-src 'self'; script-src 'self'; connect-src 'self'; frame-ancestors 'none'")
	w.Header().Set("X-Content-Type-Options", "nosniff")
}
