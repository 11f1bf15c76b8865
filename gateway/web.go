package gateway

import (
	"context"
	"embed"
	"encoding/json"
	"fmt"
	"github.com/pulsefleet/pulsefleet/caution"
	"io"
	"io/fs"
	"math"
	"net"
	"net/http"
	"strconv"
	"strings"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/store"
)

// The web page: a fleet overview and a device page, served by the HTTP
// listener from assets embedded in the binary (no network, no framework),
// and the JSON they read. Every JSON handler goes through webHandler, the one
// place where operator identity (and later authentication) is decided; the
// handlers call the same methods FleetService serves over gRPC.
//
//	GET  /                         fleet overview (HTML)
//	GET  /device/{id}              device page (HTML)
//	GET  /ui/{file}                embedded CSS and JS
//	GET  /api/fleet                every device with latest values, uptime, active episodes, a 30-minute SpO2 sparkline
//	GET  /api/device/{id}          one device, its quality figures and recent episodes
//	GET  /api/device/{id}/trend    ?minutes=N&step_s=S: trend buckets ending at the device's latest point
//	GET  /api/device/{id}/raw      ?seconds=N: the newest captured raw samples (when capture is on)
//	POST /api/device/{id}/acknowledge  {"episode_id":N,"note":"..."}: acknowledge active alarms
//	POST /api/device/{id}/pause    {"duration_s":N,"reason":"..."}: pause (0 resumes) alarm announcement
//	GET  /api/events               Server-Sent Events: device changes, episode transitions, trend points

//go:embed webui
var webAssets embed.FS

// webCaution is shown at the top of every page.
const webCaution = caution.Text

// Bounds of the page's queries.
const (
	sparkMinutes    = 30
	sparkStepMS     = 60_000
	maxTrendMinutes = 7 * 24 * 60
	maxRawSeconds   = 30
	sseKeepalive    = 15 * time.Second
	sseStopCheck    = 250 * time.Millisecond
	sseBuffer       = 512
	maxWebBody      = 4 << 10
)

// webRoutes mounts the page, its JSON and the login (auth.go) on mux. The
// page and every JSON read need the viewer role; acknowledging and pausing
// need the operator role (on an open loopback gateway, without tokens,
// everyone is an anonymous admin; see auth.go).
func (g *Gateway) webRoutes(mux *http.ServeMux) {
	ui, _ := fs.Sub(webAssets, "webui")
	page := http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		b, err := fs.ReadFile(ui, "index.html")
		if err != nil {
			http.Error(w, "page missing from this build", http.StatusInternalServerError)
			return
		}
		w.Header().Set("Content-Type", "text/html; charset=utf-8")
		pageHeaders(w)
		html := strings.NewReplacer("{{CAUTION}}", webCaution, "{{CSRF}}", g.webCSRFToken(r), "{{ACTOR}}", htmlEscape(auth.ActorFrom(webActor(r)))).Replace(string(b))
		_, _ = w.Write([]byte(html))
	})
	g.authRoutes(mux)
	mux.Handle("GET /{$}", g.requireRole(auth.RoleViewer, page))
	mux.Handle("GET /device/{id}", g.requireRole(auth.RoleViewer, page))
	// The page's assets need the viewer role like the page, carry the same
	// headers, and never include the page's template (index.html, with its
	// placeholders), which only the page handler serves, filled in.
	assets := http.StripPrefix("/ui/", http.FileServerFS(ui))
	mux.Handle("GET /ui/", g.requireRole(auth.RoleViewer, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		pageHeaders(w)
		if name := strings.TrimPrefix(r.URL.Path, "/ui/"); name == "" || name == "index.html" || strings.HasSuffix(name, "/") {
			http.NotFound(w, r)
			return
		}
		assets.ServeHTTP(w, r)
	})))

	mux.Handle("GET /api/fleet", g.webHandler(auth.RoleViewer, g.webFleet))
	mux.Handle("GET /api/device/{id}", g.webHandler(auth.RoleViewer, g.webDevice))
	mux.Handle("GET /api/device/{id}/trend", g.webHandler(auth.RoleViewer, g.webTrend))
	mux.Handle("GET /api/device/{id}/raw", g.webHandler(auth.RoleViewer, g.webRaw))
	mux.Handle("POST /api/device/{id}/acknowledge", g.webHandler(auth.RoleOperator, g.webAcknowledge))
	mux.Handle("POST /api/device/{id}/pause", g.webHandler(auth.RoleOperator, g.webPause))
	mux.Handle("GET /api/events", g.webHandler(auth.RoleViewer, g.webEvents))
}

// pageHeaders sets the security headers of the page and its assets: no
// caching, a content security policy allowing only this origin's own
// scripts, styles and connections and no framing, and no content sniffing.
func pageHeaders(w http.ResponseWriter) {
	w.Header().Set("Cache-Control", "no-store")
	w.Header().Set("Content-Security-Policy", "default-src 'self'; img-src 'self' data:; style-src 'self'; script-src 'self'; connect-src 'self'; frame-ancestors 'none'")
	w.Header().Set("X-Content-Type-Options", "nosniff")
}

func htmlEscape(s string) string {
	return strings.NewReplacer("&", "&amp;", "<", "&lt;", ">", "&gt;", `"`, "&quot;", "'", "&#39;").Replace(s)
}

// webFunc answers one JSON request; a returned error becomes a JSON error
// with the HTTP status matching its gRPC code.
type webFunc func(ctx context.Context, w http.ResponseWriter, r *http.Request) (any, error)

// webHandler is the single entry of every JSON handler: it checks the
// caller's role (auth.go: bearer header or session cookie with CSRF token),
// names the operator for the audit log (webActor) and writes the answer.
func (g *Gateway) webHandler(role auth.Role, fn webFunc) http.Handler {
	return g.requireRole(role, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		ctx := auth.WithRemote(webActor(r), r.RemoteAddr)
		w.Header().Set("Cache-Control", "no-store")
		w.Header().Set("X-Content-Type-Options", "nosniff")
		v, err := fn(ctx, w, r)
		if err != nil {
			writeWebError(w, err)
			return
		}
		if v == nil {
			return // the handler wrote its own answer (events)
		}
		w.Header().Set("Content-Type", "application/json")
		_ = json.NewEncoder(w).Encode(v)
	}))
}

// webActor returns the request's context carrying the operator's name for
// the audit log: the logged-in operator, or, on an open gateway without
// tokens, "web@HOST" (the client's address) instead of "anonymous".
func webActor(r *http.Request) context.Context {
	if a := auth.ActorFrom(r.Context()); a != "anonymous" {
		return r.Context()
	}
	host, _, err := net.SplitHostPort(r.RemoteAddr)
	if err != nil {
		host = r.RemoteAddr
	}
	return auth.WithActor(r.Context(), "web@"+host)
}

func writeWebError(w http.ResponseWriter, err error) {
	code := http.StatusInternalServerError
	st, _ := status.FromError(err)
	switch st.Code() {
	case codes.InvalidArgument, codes.OutOfRange:
		code = http.StatusBadRequest
	case codes.NotFound:
		code = http.StatusNotFound
	case codes.FailedPrecondition, codes.AlreadyExists, codes.Aborted:
		code = http.StatusConflict
	case codes.Unauthenticated:
		code = http.StatusUnauthorized
	case codes.PermissionDenied:
		code = http.StatusForbidden
	case codes.Unavailable, codes.ResourceExhausted:
		code = http.StatusServiceUnavailable
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(code)
	_ = json.NewEncoder(w).Encode(map[string]string{"error": st.Message()})
}

func badRequest(format string, args ...any) error {
	return status.Errorf(codes.InvalidArgument, format, args...)
}

// JSON shapes of the page. Times are Unix milliseconds; null = no value.

type webPoint struct {
	TimeMS int64    `json:"t_ms"`
	SpO2   *float64 `json:"spo2"`
	Pulse  *float64 `json:"pulse"`
	PI     *float64 `json:"pi"`
	SQI    *float64 `json:"sqi"`
	Flags  []string `json:"flags,omitempty"`
	Source string   `json:"source,omitempty"`
}

type webEpisode struct {
	ID          string   `json:"id"` // a string: 64-bit ids do not fit a JS number
	Device      string   `json:"device"`
	Condition   string   `json:"condition"`
	Priority    string   `json:"priority"`
	OnsetMS     int64    `json:"onset_ms"`
	AnnouncedMS int64    `json:"announced_ms,omitempty"`
	EscalatedMS int64    `json:"escalated_ms,omitempty"`
	EndedMS     int64    `json:"ended_ms,omitempty"`
	MinSpO2     *float64 `json:"min_spo2"`
	AckedBy     string   `json:"acked_by,omitempty"`
	AckedMS     int64    `json:"acked_ms,omitempty"`
	Active      bool     `json:"active"`
}

type webDevice struct {
	ID            string            `json:"id"`
	Model         string            `json:"model,omitempty"`
	Firmware      string            `json:"firmware,omitempty"`
	Mode          string            `json:"mode,omitempty"`
	Labels        map[string]string `json:"labels,omitempty"`
	Connected     bool              `json:"connected"`
	LastSeenMS    int64             `json:"last_seen_ms"`
	SessionMS     int64             `json:"session_start_ms"`
	Latest        *webPoint         `json:"latest"`
	Priority      string            `json:"priority"` // "", "low", "medium", "high"
	Conditions    []string          `json:"conditions"`
	PausedUntilMS int64             `json:"paused_until_ms,omitempty"`
	Profile       string            `json:"profile,omitempty"`
	Calibration   string            `json:"calibration,omitempty"`
	BatteryPct    *float64          `json:"battery_pct"`
	Uptime1h      float64           `json:"uptime_1h"`
	Uptime24h     float64           `json:"uptime_24h"`
	Active        []webEpisode      `json:"active_episodes"`
	Spark         []webSpark        `json:"spark,omitempty"`
}

type webSpark struct {
	TimeMS int64    `json:"t_ms"`
	SpO2   *float64 `json:"spo2"`
}

type webQuality struct {
	Sessions           uint64   `json:"sessions"`
	Reconnects         uint64   `json:"reconnects"`
	Uptime1h           float64  `json:"uptime_1h"`
	Uptime24h          float64  `json:"uptime_24h"`
	Uptime7d           float64  `json:"uptime_7d"`
	ChunksAccepted     uint64   `json:"chunks_accepted"`
	ChunksLost         uint64   `json:"chunks_lost"`
	Duplicates         uint64   `json:"duplicates"`
	LateChunks         uint64   `json:"late_chunks"`
	ChunksRejected     uint64   `json:"chunks_rejected"`
	ClockDriftPPM      *float64 `json:"clock_drift_ppm"`          // null until estimated
	EffectiveRateHz    *float64 `json:"effective_sample_rate_hz"` // null without raw samples
	ValidSpO2Share     float64  `json:"valid_spo2_share"`
	ClippingShare      float64  `json:"clipping_share"`
	LowResolutionShare float64  `json:"low_resolution_share"`
	SQI                *webDist `json:"sqi"`
	PI                 *webDist `json:"pi_pct"`
	BatteryPct         *float64 `json:"battery_pct"`
}

type webDist struct {
	Count uint64  `json:"count"`
	P10   float64 `json:"p10"`
	P50   float64 `json:"p50"`
	P90   float64 `json:"p90"`
}

type webBucket struct {
	StartMS  int64    `json:"t_ms"`
	Points   uint32   `json:"points"`
	SpO2     *float64 `json:"spo2"`
	SpO2Min  *float64 `json:"spo2_min"`
	SpO2Max  *float64 `json:"spo2_max"`
	Pulse    *float64 `json:"pulse"`
	PI       *float64 `json:"pi"`
	SQI      *float64 `json:"sqi"`
	SQIMin   *float64 `json:"sqi_min"`
	Coverage float64  `json:"coverage"` // share of the step's seconds with a point
}

func priorityName(p pb.Priority) string {
	switch p {
	case pb.Priority_PRIORITY_LOW:
		return "low"
	case pb.Priority_PRIORITY_MEDIUM:
		return "medium"
	case pb.Priority_PRIORITY_HIGH:
		return "high"
	}
	return ""
}

func webPointOf(p *pb.TrendPoint) *webPoint {
	if p == nil {
		return nil
	}
	out := &webPoint{TimeMS: p.GetTimeUnixMs(), SpO2: p.Spo2Pct, Pulse: p.PulseBpm, PI: p.PiPct, SQI: p.Sqi}
	for _, f := range flagNames {
		if p.GetFlags()&uint32(f.flag) != 0 {
			out.Flags = append(out.Flags, f.name)
		}
	}
	switch p.GetSource() {
	case pb.Source_SOURCE_GATEWAY:
		out.Source = "gateway"
	case pb.Source_SOURCE_DEVICE:
		out.Source = "device"
	}
	return out
}

func webEpisodeOf(e *pb.Episode) webEpisode {
	return webEpisode{ID: strconv.FormatUint(e.GetEpisodeId(), 10), Device: e.GetDeviceId(), Condition: e.GetCondition(),
		Priority: priorityName(e.GetPriority()), OnsetMS: e.GetOnsetUnixMs(), AnnouncedMS: e.GetAnnouncedUnixMs(),
		EscalatedMS: e.GetEscalatedUnixMs(), EndedMS: e.GetEndedUnixMs(), MinSpO2: e.MinSpo2Pct,
		AckedBy: e.GetAcknowledgedBy(), AckedMS: e.GetAcknowledgedUnixMs(), Active: e.GetActive()}
}

func webDeviceOf(d *pb.Device) webDevice {
	out := webDevice{ID: d.GetDeviceId(), Model: d.GetModel(), Firmware: d.GetFirmware(),
		Mode: strings.TrimPrefix(strings.ToLower(d.GetMode().String()), "mode_"), Labels: d.GetLabels(),
		Connected: d.GetConnected(), LastSeenMS: d.GetLastSeenUnixMs(), SessionMS: d.GetSessionStartUnixMs(),
		Latest: webPointOf(d.GetLatest()), Priority: priorityName(d.GetAlarmPriority()), Conditions: d.GetActiveConditions(),
		PausedUntilMS: d.GetAlarmsPausedUntilUnixMs(), Profile: d.GetProfile(), Calibration: d.GetCalibration(),
		Active: []webEpisode{}}
	if out.Mode == "unspecified" {
		out.Mode = ""
	}
	if out.Conditions == nil {
		out.Conditions = []string{}
	}
	if b := d.GetBatteryPct(); b >= 0 {
		out.BatteryPct = &b
	}
	return out
}

func webQualityOf(q *pb.DeviceQuality) *webQuality {
	out := &webQuality{Sessions: q.GetSessions(), Reconnects: q.GetReconnects(), Uptime1h: q.GetUptime_1H(), Uptime24h: q.GetUptime_24H(),
		Uptime7d: q.GetUptime_7D(), ChunksAccepted: q.GetChunksAccepted(), ChunksLost: q.GetChunksLost(), Duplicates: q.GetDuplicates(),
		LateChunks: q.GetLateChunks(), ChunksRejected: q.GetChunksRejected(), ClockDriftPPM: q.ClockDriftPpm,
		EffectiveRateHz: q.EffectiveSampleRateHz, ValidSpO2Share: q.GetValidSpo2Share(), ClippingShare: q.GetClippingShare(),
		LowResolutionShare: q.GetLowResolutionShare()}
	dist := func(d *pb.Distribution) *webDist {
		if d == nil || d.GetCount() == 0 {
			return nil
		}
		return &webDist{Count: d.GetCount(), P10: d.GetP10(), P50: d.GetP50(), P90: d.GetP90()}
	}
	out.SQI, out.PI = dist(q.GetSqi()), dist(q.GetPiPct())
	if b := q.GetBatteryPct(); b >= 0 {
		out.BatteryPct = &b
	}
	return out
}

func statMean(s *pb.Stat) *float64 {
	if s.GetCount() == 0 {
		return nil
	}
	v := s.GetMean()
	return &v
}

func statMin(s *pb.Stat) *float64 {
	if s.GetCount() == 0 {
		return nil
	}
	v := s.GetMin()
	return &v
}

func statMax(s *pb.Stat) *float64 {
	if s.GetCount() == 0 {
		return nil
	}
	v := s.GetMax()
	return &v
}

// trendEnd is where a device's charts end: its newest point (device clock),
// else the gateway clock.
func (g *Gateway) trendEnd(d *pb.Device) int64 {
	if l := d.GetLatest(); l != nil && l.GetTimeUnixMs() > 0 {
		return l.GetTimeUnixMs() + 1
	}
	return g.nowMS()
}

func (g *Gateway) webFleet(ctx context.Context, _ http.ResponseWriter, _ *http.Request) (any, error) {
	devs, err := g.ListDevices(ctx, &pb.ListDevicesRequest{})
	if err != nil {
		return nil, err
	}
	qs, err := g.ListDeviceQuality(ctx, &pb.ListDeviceQualityRequest{})
	if err != nil {
		return nil, err
	}
	up := map[string]*pb.DeviceQuality{}
	for _, q := range qs.GetQualities() {
		up[q.GetDeviceId()] = q
	}
	eps, err := g.ListEpisodes(ctx, &pb.ListEpisodesRequest{ActiveOnly: true, Limit: 10000})
	if err != nil {
		return nil, err
	}
	active := map[string][]webEpisode{}
	for _, e := range eps.GetEpisodes() {
		active[e.GetDeviceId()] = append(active[e.GetDeviceId()], webEpisodeOf(e))
	}
	out := struct {
		NowMS   int64       `json:"now_ms"`
		Caution string      `json:"caution"`
		Devices []webDevice `json:"devices"`
	}{NowMS: g.nowMS(), Caution: webCaution, Devices: []webDevice{}}
	for _, d := range devs.GetDevices() {
		wd := webDeviceOf(d)
		if q := up[d.GetDeviceId()]; q != nil {
			wd.Uptime1h, wd.Uptime24h = q.GetUptime_1H(), q.GetUptime_24H()
		}
		if a := active[d.GetDeviceId()]; a != nil {
			wd.Active = a
		}
		if d.GetLatest() != nil {
			to := g.trendEnd(d)
			tr, err := g.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: d.GetDeviceId(), FromUnixMs: to - sparkMinutes*60_000, ToUnixMs: to, StepMs: sparkStepMS})
			if err != nil {
				return nil, err
			}
			for _, b := range tr.GetBuckets() {
				wd.Spark = append(wd.Spark, webSpark{TimeMS: b.GetStartUnixMs(), SpO2: statMean(b.GetSpo2Pct())})
			}
		}
		out.Devices = append(out.Devices, wd)
	}
	return out, nil
}

func (g *Gateway) webDevice(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	id := r.PathValue("id")
	d, err := g.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	q, err := g.GetDeviceQuality(ctx, &pb.GetDeviceQualityRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	eps, err := g.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: id, Limit: 20})
	if err != nil {
		return nil, err
	}
	out := struct {
		NowMS    int64        `json:"now_ms"`
		Device   webDevice    `json:"device"`
		Quality  *webQuality  `json:"quality"`
		Episodes []webEpisode `json:"episodes"`
	}{NowMS: g.nowMS(), Device: webDeviceOf(d.GetDevice()), Quality: webQualityOf(q.GetQuality()), Episodes: []webEpisode{}}
	for _, e := range eps.GetEpisodes() {
		we := webEpisodeOf(e)
		out.Episodes = append(out.Episodes, we)
		if e.GetActive() {
			out.Device.Active = append(out.Device.Active, we)
		}
	}
	return out, nil
}

// queryInt reads an integer query parameter within [lo, hi]; def when absent.
func queryInt(r *http.Request, name string, def, lo, hi int64) (int64, error) {
	s := r.URL.Query().Get(name)
	if s == "" {
		return def, nil
	}
	v, err := strconv.ParseInt(s, 10, 64)
	if err != nil || v < lo || v > hi {
		return 0, badRequest("%s: %q, want an integer %d..%d", name, s, lo, hi)
	}
	return v, nil
}

func (g *Gateway) webTrend(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	id := r.PathValue("id")
	minutes, err := queryInt(r, "minutes", 60, 1, maxTrendMinutes)
	if err != nil {
		return nil, err
	}
	// About 360 buckets by default, never finer than a second.
	step, err := queryInt(r, "step_s", max(1, minutes*60/360), 1, 86400)
	if err != nil {
		return nil, err
	}
	if minutes*60/step > 5000 {
		return nil, badRequest("step_s: %d gives %d buckets over %d minutes, want at most 5000", step, minutes*60/step, minutes)
	}
	d, err := g.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	to := g.trendEnd(d.GetDevice())
	to = (to/(step*1000) + 1) * step * 1000 // whole buckets
	from := to - minutes*60_000
	tr, err := g.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: id, FromUnixMs: from, ToUnixMs: to, StepMs: step * 1000})
	if err != nil {
		return nil, err
	}
	out := struct {
		FromMS  int64       `json:"from_ms"`
		ToMS    int64       `json:"to_ms"`
		StepS   int64       `json:"step_s"`
		Buckets []webBucket `json:"buckets"`
	}{FromMS: from, ToMS: to, StepS: step, Buckets: []webBucket{}}
	for _, b := range tr.GetBuckets() {
		out.Buckets = append(out.Buckets, webBucket{StartMS: b.GetStartUnixMs(), Points: b.GetPoints(),
			SpO2: statMean(b.GetSpo2Pct()), SpO2Min: statMin(b.GetSpo2Pct()), SpO2Max: statMax(b.GetSpo2Pct()),
			Pulse: statMean(b.GetPulseBpm()), PI: statMean(b.GetPiPct()), SQI: statMean(b.GetSqi()), SQIMin: statMin(b.GetSqi()),
			Coverage: math.Min(1, float64(b.GetPoints())/float64(step))})
	}
	return out, nil
}

func (g *Gateway) webRaw(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	id := r.PathValue("id")
	secs, err := queryInt(r, "seconds", 5, 1, maxRawSeconds)
	if err != nil {
		return nil, err
	}
	d, err := g.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	to := g.trendEnd(d.GetDevice())
	from := to - secs*1000 - 60_000 // a minute of slack: trend time ends a second after its samples
	var caps []store.RawCapture
	err = g.db.RawCaptures(id, from, to+60_000, func(c store.RawCapture) bool {
		caps = append(caps, c)
		return true
	})
	if err != nil {
		return nil, status.Errorf(codes.Internal, "raw captures of %s: %v", id, err)
	}
	out := struct {
		Captured bool     `json:"captured"`
		StartMS  int64    `json:"start_ms"`
		RateHz   float64  `json:"rate_hz"`
		Red      []uint32 `json:"red"`
		IR       []uint32 `json:"ir"`
	}{Red: []uint32{}, IR: []uint32{}}
	if len(caps) == 0 {
		return out, nil
	}
	// The newest contiguous run of chunks at one rate, cut to the last secs seconds.
	last := caps[len(caps)-1]
	rate := last.RateHz
	want := int(float64(secs) * rate)
	i := len(caps) - 1
	n := len(last.Red)
	for i > 0 && n < want && caps[i-1].RateHz == rate && caps[i-1].Seq+1 == caps[i].Seq {
		i--
		n += len(caps[i].Red)
	}
	for _, c := range caps[i:] {
		out.Red, out.IR = append(out.Red, c.Red...), append(out.IR, c.IR...)
	}
	start := caps[i].DeviceTimeMS
	if cut := len(out.Red) - want; cut > 0 {
		out.Red, out.IR = out.Red[cut:], out.IR[cut:]
		start += int64(float64(cut) * 1000 / rate)
	}
	out.Captured, out.StartMS, out.RateHz = true, start, rate
	return out, nil
}

// readJSON decodes a small JSON body into v, rejecting unknown fields.
func readJSON(r *http.Request, v any) error {
	body, err := io.ReadAll(io.LimitReader(r.Body, maxWebBody+1))
	if err != nil {
		return badRequest("body: %v", err)
	}
	if len(body) > maxWebBody {
		return badRequest("body: more than %d bytes", maxWebBody)
	}
	if len(strings.TrimSpace(string(body))) == 0 {
		return nil
	}
	dec := json.NewDecoder(strings.NewReader(string(body)))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return badRequest("body: %v", err)
	}
	return nil
}

// checkSameOrigin refuses state changes from other sites' pages: a POST
// must carry the page's JSON content type (which a cross-site form cannot
// send without a preflight) and, when the browser names an Origin, come
// from this host.
func checkSameOrigin(r *http.Request) error {
	if ct := r.Header.Get("Content-Type"); !strings.HasPrefix(ct, "application/json") {
		return badRequest("Content-Type: %q, want application/json", ct)
	}
	if o := r.Header.Get("Origin"); o != "" && o != "null" {
		if o != "http://"+r.Host && o != "https://"+r.Host {
			return status.Errorf(codes.PermissionDenied, "origin %s is not this gateway (%s)", o, r.Host)
		}
	}
	return nil
}

func (g *Gateway) webAcknowledge(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	if err := checkSameOrigin(r); err != nil {
		return nil, err
	}
	var req struct {
		EpisodeID string `json:"episode_id"` // "" or "0" = every active episode
		Note      string `json:"note"`
	}
	if err := readJSON(r, &req); err != nil {
		return nil, err
	}
	var epID uint64
	if req.EpisodeID != "" {
		v, err := strconv.ParseUint(req.EpisodeID, 10, 64)
		if err != nil {
			return nil, badRequest("episode_id: %q, want a decimal episode id", req.EpisodeID)
		}
		epID = v
	}
	resp, err := g.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{DeviceId: r.PathValue("id"), EpisodeId: epID, Note: req.Note})
	if err != nil {
		return nil, err
	}
	out := struct {
		Acknowledged []webEpisode `json:"acknowledged"`
	}{Acknowledged: []webEpisode{}}
	for _, e := range resp.GetEpisodes() {
		out.Acknowledged = append(out.Acknowledged, webEpisodeOf(e))
	}
	return out, nil
}

func (g *Gateway) webPause(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	if err := checkSameOrigin(r); err != nil {
		return nil, err
	}
	var req struct {
		DurationS int64  `json:"duration_s"`
		Reason    string `json:"reason"`
	}
	if err := readJSON(r, &req); err != nil {
		return nil, err
	}
	if req.DurationS < 0 || req.DurationS > math.MaxUint32 {
		return nil, badRequest("duration_s: %d, want 0 (resume) or more seconds", req.DurationS)
	}
	resp, err := g.PauseAlarms(ctx, &pb.PauseAlarmsRequest{DeviceId: r.PathValue("id"), DurationS: uint32(req.DurationS), Reason: req.Reason})
	if err != nil {
		return nil, err
	}
	return map[string]int64{"paused_until_ms": resp.GetPausedUntilUnixMs()}, nil
}

// webEvents streams live events as Server-Sent Events until the client goes
// away or the gateway stops. ?device=ID (repeatable) limits them to devices;
// ?points=0 leaves out trend points.
func (g *Gateway) webEvents(ctx context.Context, w http.ResponseWriter, r *http.Request) (any, error) {
	fl, ok := w.(http.Flusher)
	if !ok {
		return nil, status.Error(codes.Internal, "streaming is not supported by this connection")
	}
	devices := r.URL.Query()["device"]
	for _, id := range devices {
		if err := validID("device", id); err != nil {
			return nil, badRequest("%v", err)
		}
	}
	sub := g.hub.subscribe(devices, r.URL.Query().Get("points") != "0", sseBuffer)
	defer g.hub.unsubscribe(sub)
	w.Header().Set("Content-Type", "text/event-stream")
	w.Header().Set("Cache-Control", "no-store")
	w.Header().Set("X-Accel-Buffering", "no")
	w.WriteHeader(http.StatusOK)
	fmt.Fprintf(w, "retry: 2000\n\n")
	fl.Flush()
	stop := time.NewTicker(sseStopCheck)
	defer stop.Stop()
	lastWrite := time.Now()
	for {
		select {
		case <-ctx.Done():
			return nil, nil
		case <-stop.C:
			if g.stopping.Load() {
				return nil, nil // the gateway shuts down: let the server close the connection
			}
			if time.Since(lastWrite) >= sseKeepalive {
				if _, err := fmt.Fprint(w, ": keepalive\n\n"); err != nil {
					return nil, nil
				}
				fl.Flush()
				lastWrite = time.Now()
			}
		case ev := <-sub.ch:
			name, data := sseEvent(ev)
			if name == "" {
				continue
			}
			b, err := json.Marshal(data)
			if err != nil {
				continue
			}
			if _, err := fmt.Fprintf(w, "event: %s\ndata: %s\n\n", name, b); err != nil {
				return nil, nil
			}
			// Flush when nothing else is waiting, so bursts go out together.
			if len(sub.ch) == 0 {
				fl.Flush()
			}
			lastWrite = time.Now()
		}
	}
}

// sseEvent maps a live event to the page's event name and JSON.
func sseEvent(ev *pb.WatchEventsResponse) (string, any) {
	switch e := ev.Event.(type) {
	case *pb.WatchEventsResponse_TrendPoint:
		return "point", struct {
			Device string `json:"device"`
			*webPoint
		}{e.TrendPoint.GetDeviceId(), webPointOf(e.TrendPoint)}
	case *pb.WatchEventsResponse_DeviceChange:
		return "device", struct {
			Change string    `json:"change"`
			Device webDevice `json:"device"`
		}{e.DeviceChange.GetChange(), webDeviceOf(e.DeviceChange.GetDevice())}
	case *pb.WatchEventsResponse_EpisodeEvent:
		return "episode", struct {
			Transition string     `json:"transition"`
			Actor      string     `json:"actor,omitempty"`
			Episode    webEpisode `json:"episode"`
		}{e.EpisodeEvent.GetTransition(), e.EpisodeEvent.GetActor(), webEpisodeOf(e.EpisodeEvent.GetEpisode())}
	}
	return "", nil
}
