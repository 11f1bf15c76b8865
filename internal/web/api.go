package web

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"net/http"
	"strconv"
	"strings"
	"time"

	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/attention"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ids"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

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

// webFunc answers one JSON request; a returned error becomes a JSON error
// with the HTTP status matching its gRPC code.
type webFunc func(ctx context.Context, w http.ResponseWriter, r *http.Request) (any, error)

// webHandler is the single entry of every JSON handler: it checks the
// caller's role (session.go: bearer header or session cookie with CSRF token),
// names the operator for the audit log (webActor) and writes the answer.
func (s *Server) webHandler(role auth.Role, fn webFunc) http.Handler {
	return s.requireRole(role, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		ctx := auth.WithRemote(webActor(r), r.RemoteAddr)
		w.Header().Set("Cache-Control", "no-store")
		w.Header().Set("X-Content-Type-Options", "nosniff")
		v, err := fn(ctx, w, r)
		if err != nil {
			s.writeWebError(w, err)
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

func (s *Server) writeWebError(w http.ResponseWriter, err error) {
	var e *Error
	if !errors.As(err, &e) {
		e = &Error{Status: http.StatusInternalServerError, Message: err.Error()}
		if s.cfg.HTTPError != nil {
			e.Status, e.Message = s.cfg.HTTPError(err)
		}
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(e.Status)
	_ = json.NewEncoder(w).Encode(map[string]string{"error": e.Message})
}

func badRequest(format string, args ...any) error {
	return &Error{Status: http.StatusBadRequest, Message: fmt.Sprintf(format, args...)}
}

// JSON shapes of the page. Times are Unix milliseconds; null = no value.

// trendEnd is where a device's charts end: its newest point (device clock),
// else the gateway clock.
func (s *Server) trendEnd(d *pb.Device) int64 {
	if l := d.GetLatest(); l != nil && l.GetTimeUnixMs() > 0 {
		return l.GetTimeUnixMs() + 1
	}
	return s.fleet.NowMS()
}

// fleetEntry is one device of /api/fleet.
type fleetEntry struct {
	Device Proto[*pb.Device] `json:"device"`
	// Participant is the study participant enrolled to the device now ("" = none).
	Participant string                    `json:"participant,omitempty"`
	Quality     *Proto[*pb.DeviceQuality] `json:"quality,omitempty"` // absent with quality=0
	Active      []Proto[*pb.Episode]      `json:"active_episodes"`
	Spark       *Spark                    `json:"spark,omitempty"`
	// SpO2Limits are the SpO2 thresholds of the device's profile (for the
	// sparkline), with the spark only.
	SpO2Limits []Limit `json:"spo2_limits,omitempty"`
}

// FleetJSON is the answer of /api/fleet.
type FleetJSON struct {
	NowMS   int64             `json:"now_ms"`
	Caution string            `json:"caution"`
	StaleMS int64             `json:"stale_ms"` // a value older than this is not current (attention.Stale)
	Labels  map[string]string `json:"labels"`   // condition -> readable label
	Devices []fleetEntry      `json:"devices"`
}

// FleetEntryJSON is one device of FleetJSON (for Go clients: the tests).
type FleetEntryJSON = fleetEntry

// webFleet answers /api/fleet: every device with its active episodes, its
// quality figures (uptime; unless ?quality=0) and a 30-minute SpO2
// sparkline with its profile's SpO2 limits (unless ?spark=0). The page
// orders and filters it itself; it asks for the light answer (spark=0,
// quality=0) every few seconds and the full one every minute, as the
// figures left out change slowly and cost most (BenchmarkWebOverview5000).
func (s *Server) webFleet(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	devs, err := s.fleet.ListDevices(ctx, &pb.ListDevicesRequest{})
	if err != nil {
		return nil, err
	}
	up := map[string]*pb.DeviceQuality{}
	if r.URL.Query().Get("quality") != "0" {
		qs, err := s.fleet.ListDeviceQuality(ctx, &pb.ListDeviceQualityRequest{})
		if err != nil {
			return nil, err
		}
		for _, q := range qs.GetQualities() {
			up[q.GetDeviceId()] = q
		}
	}
	eps, err := s.fleet.ListEpisodes(ctx, &pb.ListEpisodesRequest{ActiveOnly: true, Limit: 10000})
	if err != nil {
		return nil, err
	}
	active := map[string][]Proto[*pb.Episode]{}
	for _, e := range eps.GetEpisodes() {
		active[e.GetDeviceId()] = append(active[e.GetDeviceId()], P(e))
	}
	held, err := s.fleet.Participants(s.fleet.NowMS())
	if err != nil {
		return nil, err
	}
	out := FleetJSON{NowMS: s.fleet.NowMS(), Caution: webCaution, StaleMS: attention.DefaultStale.Milliseconds(),
		Labels: conditionLabels(devs.GetDevices(), eps.GetEpisodes()), Devices: make([]fleetEntry, 0, len(devs.GetDevices()))}
	sparks := r.URL.Query().Get("spark") != "0"
	profiles := profileCache{}
	for _, d := range devs.GetDevices() {
		e := fleetEntry{Device: P(d), Participant: held[d.GetDeviceId()], Active: active[d.GetDeviceId()]}
		if q := up[d.GetDeviceId()]; q != nil {
			pq := P(q)
			e.Quality = &pq
		}
		if e.Active == nil {
			e.Active = []Proto[*pb.Episode]{}
		}
		if sparks {
			if e.Spark, err = s.spark(ctx, d); err != nil {
				return nil, err
			}
			prof, err := profiles.of(ctx, s.fleet, d.GetDeviceId())
			if err != nil {
				return nil, err
			}
			for _, l := range prof.Limits {
				if l.Quantity == "spo2" {
					e.SpO2Limits = append(e.SpO2Limits, l)
				}
			}
		}
		out.Devices = append(out.Devices, e)
	}
	return out, nil
}

// spark is the device's SpO2 sparkline (nil before its first value).
func (s *Server) spark(ctx context.Context, d *pb.Device) (*Spark, error) {
	if d.GetLatest() == nil {
		return nil, nil
	}
	to := s.trendEnd(d)
	from := to - sparkMinutes*60_000
	from -= from % sparkStepMS
	tr, err := s.fleet.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: d.GetDeviceId(), FromUnixMs: from, ToUnixMs: to, StepMs: sparkStepMS})
	if err != nil {
		return nil, err
	}
	sp := &Spark{StartMS: from, StepMS: sparkStepMS, SpO2: make([]*float64, (to-from+sparkStepMS-1)/sparkStepMS)}
	for _, b := range tr.GetBuckets() {
		if i := (b.GetStartUnixMs() - from) / sparkStepMS; i >= 0 && i < int64(len(sp.SpO2)) && b.GetSpo2Pct().GetCount() > 0 {
			v := b.GetSpo2Pct().GetMean()
			sp.SpO2[i] = &v
		}
	}
	return sp, nil
}

// profileCache turns each distinct profile into its limits once per
// answer (a fleet mostly shares a few profiles).
type profileCache map[*alarms.Profile]map[string]*Profile

func (c profileCache) of(_ context.Context, f Fleet, device string) (*Profile, error) {
	ap, origin, err := f.AlarmProfile(device)
	if err != nil {
		return nil, err
	}
	if p := c[ap][origin]; p != nil {
		return p, nil
	}
	p := &Profile{Name: ap.Name, Origin: origin, Limits: limitsOf(ap)}
	if c[ap] == nil {
		c[ap] = map[string]*Profile{}
	}
	c[ap][origin] = p
	return p, nil
}

// DeviceJSON is the answer of /api/device/{id}.
type DeviceJSON struct {
	NowMS   int64             `json:"now_ms"`
	Caution string            `json:"caution"`
	StaleMS int64             `json:"stale_ms"`
	Labels  map[string]string `json:"labels"`
	Device  Proto[*pb.Device] `json:"device"`
	// Participant is the study participant enrolled to the device now ("" = none).
	Participant string                   `json:"participant,omitempty"`
	Quality     Proto[*pb.DeviceQuality] `json:"quality"`
	Episodes    []Proto[*pb.Episode]     `json:"episodes"` // the 20 newest, newest first
	Profile     *Profile                 `json:"profile"`
}

func (s *Server) webDevice(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	id := r.PathValue("id")
	d, err := s.fleet.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	q, err := s.fleet.GetDeviceQuality(ctx, &pb.GetDeviceQualityRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	eps, err := s.fleet.ListEpisodes(ctx, &pb.ListEpisodesRequest{DeviceId: id, Limit: 20})
	if err != nil {
		return nil, err
	}
	prof, err := profileCache{}.of(ctx, s.fleet, id)
	if err != nil {
		return nil, err
	}
	held, err := s.fleet.Participants(s.fleet.NowMS())
	if err != nil {
		return nil, err
	}
	out := DeviceJSON{NowMS: s.fleet.NowMS(), Caution: webCaution, StaleMS: attention.DefaultStale.Milliseconds(),
		Labels: conditionLabels([]*pb.Device{d.GetDevice()}, eps.GetEpisodes()), Device: P(d.GetDevice()),
		Participant: held[id], Quality: P(q.GetQuality()), Episodes: []Proto[*pb.Episode]{}, Profile: prof}
	for _, e := range eps.GetEpisodes() {
		out.Episodes = append(out.Episodes, P(e))
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

func (s *Server) webTrend(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
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
	d, err := s.fleet.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	to := s.trendEnd(d.GetDevice())
	to = (to/(step*1000) + 1) * step * 1000 // whole buckets
	from := to - minutes*60_000
	tr, err := s.fleet.QueryTrend(ctx, &pb.QueryTrendRequest{DeviceId: id, FromUnixMs: from, ToUnixMs: to, StepMs: step * 1000})
	if err != nil {
		return nil, err
	}
	return TrendJSON{FromMS: from, ToMS: to, StepS: step, Trend: P(tr)}, nil
}

// TrendJSON is the answer of /api/device/{id}/trend: the buckets of
// QueryTrend (steps without points left out) over [from_ms, to_ms).
type TrendJSON struct {
	FromMS int64                         `json:"from_ms"`
	ToMS   int64                         `json:"to_ms"`
	StepS  int64                         `json:"step_s"`
	Trend  Proto[*pb.QueryTrendResponse] `json:"trend"`
}

func (s *Server) webRaw(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
	id := r.PathValue("id")
	secs, err := queryInt(r, "seconds", 5, 1, maxRawSeconds)
	if err != nil {
		return nil, err
	}
	d, err := s.fleet.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: id})
	if err != nil {
		return nil, err
	}
	to := s.trendEnd(d.GetDevice())
	from := to - secs*1000 - 60_000 // a minute of slack: trend time ends a second after its samples
	var caps []store.RawCapture
	err = s.fleet.RawCaptures(id, from, to+60_000, func(c store.RawCapture) bool {
		caps = append(caps, c)
		return true
	})
	if err != nil {
		return nil, &Error{Status: http.StatusInternalServerError, Message: fmt.Sprintf("raw captures of %s: %v", id, err)}
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
			return &Error{Status: http.StatusForbidden, Message: fmt.Sprintf("origin %s is not this gateway (%s)", o, r.Host)}
		}
	}
	return nil
}

func (s *Server) webAcknowledge(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
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
	resp, err := s.fleet.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{DeviceId: r.PathValue("id"), EpisodeId: epID, Note: req.Note})
	if err != nil {
		return nil, err
	}
	return P(resp), nil
}

func (s *Server) webPause(ctx context.Context, _ http.ResponseWriter, r *http.Request) (any, error) {
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
	resp, err := s.fleet.PauseAlarms(ctx, &pb.PauseAlarmsRequest{DeviceId: r.PathValue("id"), DurationS: uint32(req.DurationS), Reason: req.Reason})
	if err != nil {
		return nil, err
	}
	return map[string]int64{"paused_until_ms": resp.GetPausedUntilUnixMs()}, nil
}

// webEvents streams live events as Server-Sent Events until the client goes
// away or the gateway stops. ?device=ID (repeatable) limits them to devices;
// ?points=0 leaves out trend points.
func (s *Server) webEvents(ctx context.Context, w http.ResponseWriter, r *http.Request) (any, error) {
	fl, ok := w.(http.Flusher)
	if !ok {
		return nil, &Error{Status: http.StatusInternalServerError, Message: "streaming is not supported by this connection"}
	}
	devices := r.URL.Query()["device"]
	for _, id := range devices {
		if err := ids.Check("device", id); err != nil {
			return nil, badRequest("%v", err)
		}
	}
	events, unsubscribe := s.fleet.Watch(devices, r.URL.Query().Get("points") != "0", sseBuffer)
	defer unsubscribe()
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
			if s.fleet.Stopping() {
				return nil, nil // the gateway shuts down: let the server close the connection
			}
			if time.Since(lastWrite) >= sseKeepalive {
				if _, err := fmt.Fprint(w, ": keepalive\n\n"); err != nil {
					return nil, nil
				}
				fl.Flush()
				lastWrite = time.Now()
			}
		case ev := <-events:
			name, data := sseEvent(ev)
			if name == "" {
				continue
			}
			b, err := pjOut.Marshal(data)
			if err != nil {
				continue
			}
			if _, err := fmt.Fprintf(w, "event: %s\ndata: %s\n\n", name, b); err != nil {
				return nil, nil
			}
			// Flush when nothing else is waiting, so bursts go out together.
			if len(events) == 0 {
				fl.Flush()
			}
			lastWrite = time.Now()
		}
	}
}

// sseEvent maps a live event to the page's event name and its message
// (protojson): point (TrendPoint), device (DeviceChange) or episode
// (EpisodeEvent).
func sseEvent(ev *pb.WatchEventsResponse) (string, proto.Message) {
	switch e := ev.Event.(type) {
	case *pb.WatchEventsResponse_TrendPoint:
		return "point", e.TrendPoint
	case *pb.WatchEventsResponse_DeviceChange:
		return "device", e.DeviceChange
	case *pb.WatchEventsResponse_EpisodeEvent:
		return "episode", e.EpisodeEvent
	}
	return "", nil
}
