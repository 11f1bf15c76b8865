package gateway

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"net"
	"net/http"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/reflection"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/web"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Gateway serves devices and operators. Create it with New, run it with Serve.
type Gateway struct {
	pb.UnimplementedIngestServiceServer
	pb.UnimplementedFleetServiceServer
	pb.UnimplementedAdminServiceServer

	opt     Options
	log     *slog.Logger
	backups *backupMetrics
	history *pacer // paces ExportTrend's reads (Options.ExportRate)
	m       *metrics
	db      *store.DB
	w       *writer
	hub     *hub
	devices registry
	health  *health.Server

	defaultMu      sync.RWMutex
	defaultProfile *alarms.Profile

	ready    atomic.Bool
	stopping atomic.Bool
	failed   atomic.Pointer[error]

	ring *shard.Ring // nil without sharding

	calMu     sync.RWMutex
	calAssign map[string]string // calibration assignments: "device:ID"/"model:M" -> "name@vN"

	auth  *auth.Authenticator // credentials, roles, the gRPC guards
	secMu sync.RWMutex
	sec   SecurityOptions // in effect (applySecurity)
	web   *web.Server     // the page, its JSON and the login
}

// New builds a gateway over an open store: it loads devices, cursors and
// alarm states so that nothing is announced twice after a restart.
func New(opt Options) (*Gateway, error) {
	if err := opt.setDefaults(); err != nil {
		return nil, err
	}
	g := &Gateway{opt: opt, log: opt.Logger, db: opt.Store, history: newPacer(opt.ExportRate), devices: registry{m: map[string]*device{}},
		defaultProfile: opt.DefaultProfile}
	m, err := newMetrics(opt.Registerer, func() float64 { return float64(opt.Store.Size()) })
	if err != nil {
		return nil, fmt.Errorf("gateway: metrics: %w", err)
	}
	g.m = m
	if g.backups, err = newBackupMetrics(opt.Registerer, opt.Backups, opt.Store.ID()); err != nil {
		return nil, fmt.Errorf("gateway: metrics: %w", err)
	}
	if len(opt.Peers) > 0 {
		r, err := shard.NewRing(opt.Peers)
		if err != nil {
			return nil, fmt.Errorf("gateway: peers: %w", err)
		}
		g.ring = r
	}
	if g.opt.ResolveCalibration == nil {
		g.opt.ResolveCalibration = g.resolveStoredCalibration
	}
	g.hub = newHub(m)
	a, err := auth.New(auth.Config{Store: opt.Store, Registerer: opt.Registerer, Log: opt.Logger, NowMS: g.nowMS, Audit: g.audit},
		auth.Options{RequireTokens: opt.Security.RequireTokens, AuditPerMinute: opt.Security.AuthAuditPerMinute})
	if err != nil {
		return nil, fmt.Errorf("gateway: %w", err)
	}
	g.auth = a
	g.applySecurity(opt.Security)
	g.web = g.newWeb()
	g.w = newWriter(opt.Store, opt.BatchDelay, opt.BatchRecords, m, opt.Now, g.storeFailed, g.storeWorks)
	if err := g.load(); err != nil {
		return nil, err
	}
	return g, nil
}

// load restores devices, cursors, profiles and alarm engines from the store.
func (g *Gateway) load() error {
	descs, err := g.db.Devices()
	if err != nil {
		return fmt.Errorf("gateway: load devices: %w", err)
	}
	curs, err := g.db.Cursors()
	if err != nil {
		return fmt.Errorf("gateway: load cursors: %w", err)
	}
	profs, err := g.db.Profiles()
	if err != nil {
		return fmt.Errorf("gateway: load profiles: %w", err)
	}
	if b, ok := profs[""]; ok {
		p, err := alarms.ParseProfile(b)
		if err != nil {
			return fmt.Errorf("gateway: stored default profile: %w", err)
		}
		g.defaultProfile = p
	}
	if g.calAssign, err = g.db.CalibrationAssignments(); err != nil {
		return fmt.Errorf("gateway: load calibration assignments: %w", err)
	}
	states, err := g.db.AlarmStates()
	if err != nil {
		return fmt.Errorf("gateway: load alarm states: %w", err)
	}
	for _, desc := range descs {
		d, _ := g.devices.getOrCreate(desc.ID)
		d.desc = desc
		if c, ok := curs[desc.ID]; ok {
			d.cur = c
			d.durableSeq = c.LastSeq
		}
		if b, ok := profs[desc.ID]; ok {
			p, err := alarms.ParseProfile(b)
			if err != nil {
				return fmt.Errorf("gateway: stored profile of %s: %w", desc.ID, err)
			}
			d.profile, d.ownProfile = p, true
		}
		if b, ok := states[desc.ID]; ok {
			var st alarms.State
			if err := json.Unmarshal(b, &st); err != nil {
				return fmt.Errorf("gateway: alarm state of %s: %w", desc.ID, err)
			}
			p := d.profile
			if p == nil {
				p = g.defaultProfile
			}
			if p != nil {
				e, err := alarms.Restore(p, st)
				if err != nil {
					g.log.Warn("alarm state not restored; starting fresh", "device", desc.ID, "err", err)
				} else {
					d.engine, d.profile, d.alarmRev = e, p, e.Revision()
				}
			}
		}
		if d.restoreClock(g.nowMS()) {
			g.log.Warn("alarm state carried a time ahead of the gateway clock; evaluation rewound to now", "device", desc.ID)
		}
		g.refreshActive(d)
	}
	return nil
}

// ensureEngine gives a device an alarm engine for its profile. Caller holds d.mu.
func (g *Gateway) ensureEngine(d *device) {
	if d.engine != nil {
		return
	}
	p := d.profile
	if p == nil {
		g.defaultMu.RLock()
		p = g.defaultProfile
		g.defaultMu.RUnlock()
	}
	if p == nil {
		return
	}
	e, err := alarms.NewEngine(p, d.id)
	if err != nil {
		g.log.Error("alarm engine", "device", d.id, "err", err)
		return
	}
	d.engine, d.profile = e, p
}

// storeFailed is called by the writer when a batch did not commit: nothing
// in it was acknowledged. The gateway stops being ready until a write
// commits again. Each device with data in the batch enters a new write
// epoch: what it sent after the failed range and is still queued is not
// written nor acknowledged (writer.go), its cursor goes back to the last
// durable message, and its stream ends with RESOURCE_EXHAUSTED (store full)
// or UNAVAILABLE, so the device backs off and resends from the resume point
// of its next welcome. Streams of other devices go on. Runs in the writer
// goroutine, before the writer takes any later record.
func (g *Gateway) storeFailed(err error, devs map[*device]bool) {
	g.log.Error("store write failed; ending the streams of the devices in the batch", "err", err, "devices", len(devs))
	g.failed.Store(&err)
	for d := range devs {
		d.mu.Lock()
		d.epoch.Add(1)
		d.rewindToDurable()
		s := d.stream
		d.mu.Unlock()
		if s != nil {
			s.cancel(&storeFault{err: err})
		}
	}
}

// storeWorks is called by the writer after a batch committed.
func (g *Gateway) storeWorks() {
	if g.failed.Load() != nil {
		g.failed.Store(nil)
		g.log.Info("store writes succeed again")
	}
}

// storeFault is the cause of a stream ended because a batch with its
// device's data failed to commit.
type storeFault struct{ err error }

func (e *storeFault) Error() string { return "store write failed: " + e.err.Error() }
func (e *storeFault) Unwrap() error { return e.err }

// Serve runs the gRPC server on grpcLis and the HTTP server on httpLis
// (either may be nil) until ctx ends, then shuts down gracefully: stop
// accepting, end streams, flush the writer (acknowledging what it commits).
func (g *Gateway) Serve(ctx context.Context, grpcLis, httpLis net.Listener) error {
	opts := append([]grpc.ServerOption{
		grpc.MaxRecvMsgSize(transportMaxBytes),
		grpc.MaxConcurrentStreams(maxStreamsPerConn),
		grpc.KeepaliveEnforcementPolicy(keepalive.EnforcementPolicy{MinTime: 5 * time.Second, PermitWithoutStream: true}),
		grpc.KeepaliveParams(keepalive.ServerParameters{Time: 30 * time.Second, Timeout: 10 * time.Second}),
		grpc.InitialWindowSize(streamWindow),
		grpc.InitialConnWindowSize(connWindow),
		grpc.ReadBufferSize(16 << 10),
		grpc.WriteBufferSize(16 << 10),
	}, g.opt.GRPCServerOptions...)
	opts = append(opts, g.auth.ServerOptions()...)
	srv := grpc.NewServer(opts...)
	pb.RegisterIngestServiceServer(srv, g)
	pb.RegisterFleetServiceServer(srv, g)
	pb.RegisterAdminServiceServer(srv, g)
	pb.RegisterParticipantServiceServer(srv, &participantService{g: g})
	g.health = health.NewServer()
	healthpb.RegisterHealthServer(srv, g.health)
	reflection.Register(srv)

	var wg sync.WaitGroup
	errc := make(chan error, 3)
	wg.Add(1)
	go func() { defer wg.Done(); g.w.run() }()
	wdCtx, wdStop := context.WithCancel(context.Background())
	wg.Add(1)
	go func() { defer wg.Done(); g.watchdog(wdCtx) }()
	wg.Add(1)
	go func() { defer wg.Done(); g.runBackups(ctx) }()

	var hs *http.Server
	if httpLis != nil {
		hs = &http.Server{Handler: g.httpHandler(), ReadHeaderTimeout: 10 * time.Second}
		wg.Add(1)
		go func() {
			defer wg.Done()
			if err := hs.Serve(httpLis); err != nil && !errors.Is(err, http.ErrServerClosed) {
				errc <- fmt.Errorf("http: %w", err)
			}
		}()
	}
	if grpcLis != nil {
		wg.Add(1)
		go func() {
			defer wg.Done()
			if err := srv.Serve(grpcLis); err != nil {
				errc <- fmt.Errorf("grpc: %w", err)
			}
		}()
	}
	g.health.SetServingStatus("", healthpb.HealthCheckResponse_SERVING)
	for _, svc := range []string{pb.IngestService_ServiceDesc.ServiceName, pb.FleetService_ServiceDesc.ServiceName, pb.AdminService_ServiceDesc.ServiceName} {
		g.health.SetServingStatus(svc, healthpb.HealthCheckResponse_SERVING)
	}
	g.ready.Store(true)

	var serveErr error
	select {
	case <-ctx.Done():
	case serveErr = <-errc:
	}

	// Shutdown: not ready, no new streams; open streams end (devices resend
	// anything not acknowledged); the writer commits what is queued and
	// acknowledges it as far as the streams are still there to hear it.
	g.ready.Store(false)
	g.stopping.Store(true)
	g.health.Shutdown()
	done := make(chan struct{})
	go func() { srv.GracefulStop(); close(done) }()
	// Make everything accepted so far durable, so each stream's last ack is
	// due before it is asked to end (the handler sends it on the way out).
	sctx, scancel := context.WithTimeout(context.Background(), g.opt.GracefulTimeout)
	if err := g.w.sync(sctx, nil); err != nil {
		g.log.Warn("shutdown: store flush", "err", err)
	}
	scancel()
	// Streams are long-lived: ask them to end now rather than wait for devices.
	for _, d := range g.devices.all() {
		d.mu.Lock()
		if s := d.stream; s != nil {
			s.cancel(errors.New("gateway shutting down"))
		}
		d.mu.Unlock()
	}
	select {
	case <-done:
	case <-time.After(g.opt.GracefulTimeout):
		srv.Stop()
		<-done
	}
	if hs != nil {
		sctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		_ = hs.Shutdown(sctx)
		cancel()
	}
	wdStop()
	g.w.close()
	wg.Wait()
	g.log.Info("gateway stopped")
	return serveErr
}

// Ready reports whether the gateway serves and its last store write
// committed (for tests and /readyz).
func (g *Gateway) Ready() bool { return g.ready.Load() && g.failed.Load() == nil }

// watchdog lets time pass for the alarm engines of devices without a stream,
// so device_offline (and signal_lost) can be announced, and persists changes;
// once an hour it drops history older than the retention.
func (g *Gateway) watchdog(ctx context.Context) {
	t := time.NewTicker(g.opt.WatchdogEvery)
	defer t.Stop()
	var lastPrune time.Time
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		if r := g.opt.Retention; (r.TrendDays > 0 || r.RawDays > 0 || r.LedgerDays > 0) && g.opt.Now().Sub(lastPrune) > time.Hour {
			lastPrune = g.opt.Now()
			if n, err := g.db.Prune(g.nowMS(), r); err != nil {
				g.log.Error("retention", "err", err)
			} else if n > 0 {
				g.log.Info("retention dropped old day buckets", "buckets", n)
			}
		}
		if g.failed.Load() != nil {
			// Readiness must come back when writes do, even if no device
			// writes (a load balancer sends none to an unready gateway).
			if err := g.db.Probe(g.opt.Now()); err == nil {
				g.storeWorks()
			}
		}
		nowMS := g.nowMS()
		for _, d := range g.devices.all() {
			if s := d.streamNow(); s != nil {
				s.checkStall()
			}
			d.mu.Lock()
			// Streams move their own engines, but a device whose every
			// message is refused for its clock still needs time to pass
			// for device_clock_fault to be announced.
			if d.engine == nil || d.stream != nil && !d.engine.ClockFault() {
				d.mu.Unlock()
				continue
			}
			var evs []alarms.Event
			d.engine.Tick(d.techNowS(nowMS), func(e alarms.Event) { evs = append(evs, e) })
			rec := &record{dev: d}
			g.alarmEffects(d, evs, rec)
			d.mu.Unlock()
			if rec.alarm != nil || len(rec.episodes) > 0 {
				_ = g.w.submit(ctx, rec)
			}
		}
	}
}

// alarmEffects turns engine events into stored episodes, metrics and live
// events, and attaches a new snapshot to rec when the state changed.
// Caller holds d.mu.
func (g *Gateway) alarmEffects(d *device, evs []alarms.Event, rec *record) {
	for i := range evs {
		e := &evs[i]
		switch e.Type {
		case alarms.EventOnset:
			continue // logged once it is announced or withdrawn
		case alarms.EventAnnounced, alarms.EventEscalated:
			g.m.announcements.WithLabelValues(e.Episode.Condition, e.Episode.Priority.String()).Inc()
		}
		g.m.episodeEvents.WithLabelValues(e.Type.String()).Inc()
		var ep *store.Episode
		if e.Type != alarms.EventPaused && e.Type != alarms.EventResumed {
			ep = g.storeEpisode(d, &e.Episode)
			rec.episodes = append(rec.episodes, ep)
		}
		if e.Type == alarms.EventPaused || e.Type == alarms.EventResumed || e.Type == alarms.EventAcknowledged {
			who := e.Who
			if who == "" {
				who = "system"
			}
			rec.audit = append(rec.audit, &store.AuditEntry{TimeMS: g.nowMS(), Actor: who, Action: "alarm." + e.Type.String(), Device: d.id,
				Detail: episodeDetail(e)})
		}
		if g.hub.hasWatchers() {
			ev := &pb.EpisodeEvent{Transition: e.Type.String(), Actor: e.Who}
			if ep != nil {
				ev.Episode = episodeProto(ep)
			} else {
				ev.Episode = &pb.Episode{DeviceId: d.id}
			}
			g.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_EpisodeEvent{EpisodeEvent: ev}})
		}
	}
	if len(evs) > 0 {
		g.refreshActive(d)
	}
	if snap := d.alarmSnapshot(); snap != nil {
		rec.dev = d
		rec.alarm = snap
	}
}

func episodeDetail(e *alarms.Event) string {
	switch e.Type {
	case alarms.EventPaused:
		return fmt.Sprintf("paused until %s", time.UnixMilli(int64(e.Until*1000)).UTC().Format(time.RFC3339))
	case alarms.EventResumed:
		return "pause ended"
	}
	return fmt.Sprintf("%s episode %d (%s)", e.Episode.Condition, e.Episode.ID, e.Episode.Priority)
}

// storeEpisode maps an engine episode to its stored form; the stored id
// combines the device's store index and the engine's per-device id.
func (g *Gateway) storeEpisode(d *device, e *alarms.Episode) *store.Episode {
	ms := func(s float64) int64 {
		if math.IsNaN(s) {
			return 0
		}
		return int64(math.Round(s * 1000))
	}
	min := e.MinSpO2
	if math.IsNaN(min) {
		min = -1
	}
	prof := ""
	if d.profile != nil {
		prof = d.profile.Name
	}
	return &store.Episode{
		ID: uint64(d.desc.Index)<<32 | (e.ID & 0xffffffff), Device: d.id, Condition: e.Condition, Priority: e.Priority.String(),
		OnsetMS: ms(e.OnsetS), AnnouncedMS: ms(e.AnnouncedS), EscalatedMS: ms(e.EscalatedS), EndedMS: ms(e.EndedS),
		MinSpO2: min, DeficitPctS: e.DeficitPctS, AckedBy: e.AckedBy, AckedMS: ms(e.AckedS),
		Active: e.Announced() && (e.Phase == alarms.Active || e.Phase == alarms.Latched), Profile: prof,
	}
}

// refreshActive recomputes the device's contribution to the active-alarm
// gauge from its engine. Caller holds d.mu.
func (g *Gateway) refreshActive(d *device) {
	now := map[[2]string]float64{}
	if d.engine != nil {
		for _, e := range d.engine.Episodes(nil) {
			if e.Announced() && (e.Phase == alarms.Active || e.Phase == alarms.Latched) {
				now[[2]string{e.Condition, e.Priority.String()}]++
			}
		}
	}
	for k, v := range d.activeGauge {
		if now[k] != v {
			g.m.alarmsActive.WithLabelValues(k[0], k[1]).Sub(v)
		}
	}
	for k, v := range now {
		if d.activeGauge[k] != v {
			g.m.alarmsActive.WithLabelValues(k[0], k[1]).Add(v)
		}
	}
	d.activeGauge = now
}

// publishDevice sends a connection change to watchers.
func (g *Gateway) publishDevice(d *device, change string) {
	if !g.hub.hasWatchers() {
		return
	}
	d.mu.Lock()
	pd := d.toProto()
	d.mu.Unlock()
	g.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_DeviceChange{DeviceChange: &pb.DeviceChange{Device: pd, Change: change}}})
}

// audit writes an audit entry through the writer (durable before it returns).
func (g *Gateway) audit(ctx context.Context, actor, action, device, detail, remote string) {
	e := &store.AuditEntry{TimeMS: g.nowMS(), Actor: actor, Action: action, Device: device, Detail: detail, Remote: remote}
	if err := g.w.submit(context.WithoutCancel(ctx), &record{audit: []*store.AuditEntry{e}}); err != nil {
		g.log.Warn("audit entry not stored", "action", action, "err", err)
	}
}

// ownerOf returns the address of the gateway that owns deviceID when it is
// not this one ("" = this one, or no sharding).
func (g *Gateway) ownerOf(deviceID string) string {
	if g.ring == nil {
		return ""
	}
	if o := g.ring.Owner(deviceID); o != g.opt.Self {
		return o
	}
	return ""
}

// assignedCalibration returns the calibration assigned to a device or its
// model, from the gateway's copy of the assignments (read once, updated by
// AssignCalibration), so thousands of devices connecting at once do not each
// open a store transaction.
func (g *Gateway) assignedCalibration(deviceID, model string) string {
	g.calMu.RLock()
	defer g.calMu.RUnlock()
	if r, ok := g.calAssign["device:"+deviceID]; ok {
		return r
	}
	return g.calAssign["model:"+model]
}

func episodeProto(e *store.Episode) *pb.Episode {
	out := &pb.Episode{
		EpisodeId: e.ID, DeviceId: e.Device, Condition: e.Condition, Priority: priorityFromString(e.Priority),
		OnsetUnixMs: e.OnsetMS, AnnouncedUnixMs: e.AnnouncedMS, EscalatedUnixMs: e.EscalatedMS, EndedUnixMs: e.EndedMS,
		AreaBelowLimitPctS: e.DeficitPctS, AcknowledgedBy: e.AckedBy, AcknowledgedUnixMs: e.AckedMS, Active: e.Active, Profile: e.Profile,
	}
	if e.MinSpO2 >= 0 {
		v := e.MinSpO2
		out.MinSpo2Pct = &v
	}
	return out
}

func priorityFromString(s string) pb.Priority {
	p, err := alarms.ParsePriority(s)
	if err != nil {
		return pb.Priority_PRIORITY_UNSPECIFIED
	}
	return priorityProto(p)
}
