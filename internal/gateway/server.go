package gateway

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
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

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/store"
	"github.com/pulsefleet/pulsefleet/internal/web"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
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
	db      *store.DB
	ingest  *ingest.Pipeline // devices, their streams, the writer, live events
	health  *health.Server

	ready    atomic.Bool
	stopping atomic.Bool

	ring *shard.Ring // nil without sharding

	resentPlan map[string]store.HeldRange // fleet on etcd: records to check with the other gateways (resent.go)
	resentDone atomic.Bool                // the check is over (resent.go)

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
	g := &Gateway{opt: opt, log: opt.Logger, db: opt.Store, history: newPacer(opt.ExportRate)}
	var err error
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
	a, err := auth.New(auth.Config{Store: opt.Store, Registerer: opt.Registerer, Log: opt.Logger, NowMS: g.nowMS, Audit: g.audit},
		auth.Options{RequireTokens: opt.Security.RequireTokens, AuditPerMinute: opt.Security.AuthAuditPerMinute})
	if err != nil {
		return nil, fmt.Errorf("gateway: %w", err)
	}
	g.auth = a
	g.applySecurity(opt.Security)
	if g.calAssign, err = g.db.CalibrationAssignments(); err != nil {
		return nil, fmt.Errorf("gateway: load calibration assignments: %w", err)
	}
	g.ingest, err = ingest.New(ingest.Config{
		Store: opt.Store, Registerer: opt.Registerer, Log: opt.Logger, Now: opt.Now,
		BatchDelay: opt.BatchDelay, BatchRecords: opt.BatchRecords, MaxMessageBytes: opt.MaxMessageBytes,
		MaxChunkSamples: opt.MaxChunkSamples, LateAfter: opt.LateAfter, SendStall: opt.sendStall,
		CaptureRaw: opt.CaptureRaw, TrendDays: opt.Retention.TrendDays, DefaultProfile: opt.DefaultProfile,
		Limits: g.streamLimits, Owner: g.ownerOf, Fence: g.fence(), Alarms: g.alarmShare(), Authorize: g.auth.AuthorizeDevice, Calibration: g.streamCalibration,
	})
	if err != nil {
		return nil, fmt.Errorf("gateway: %w", err)
	}
	if g.backups, err = newBackupMetrics(opt.Registerer, opt.Backups, opt.Store.ID()); err != nil {
		return nil, fmt.Errorf("gateway: metrics: %w", err)
	}
	if err := g.planResent(); err != nil {
		return nil, fmt.Errorf("gateway: %w", err)
	}
	g.web = g.newWeb()
	return g, nil
}

func (g *Gateway) nowMS() int64 { return g.opt.Now().UnixMilli() }

// newGRPCServer builds the gRPC server with the transport bounds
// (options.go), the caller's options and the guards of internal/auth, and
// registers every service.
func (g *Gateway) newGRPCServer() *grpc.Server {
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
	return srv
}

// Serve runs the gRPC server on grpcLis and the HTTP server on httpLis
// (either may be nil) until ctx ends, then shuts down gracefully (shutdown).
func (g *Gateway) Serve(ctx context.Context, grpcLis, httpLis net.Listener) error {
	srv := g.newGRPCServer()
	var wg sync.WaitGroup
	errc := make(chan error, 3)
	wg.Add(1)
	go func() { defer wg.Done(); g.ingest.RunWriter() }()
	wdCtx, wdStop := context.WithCancel(context.Background())
	wg.Add(1)
	go func() { defer wg.Done(); g.watchdog(wdCtx) }()
	wg.Add(1)
	go func() { defer wg.Done(); g.runBackups(ctx) }()
	wg.Add(2)
	go func() { defer wg.Done(); g.answerHeld(wdCtx) }()
	go func() { defer wg.Done(); g.reconcileResent(wdCtx) }()

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
	g.shutdown(srv, hs)
	wdStop()
	g.ingest.CloseWriter()
	wg.Wait()
	g.log.Info("gateway stopped")
	return serveErr
}

// shutdown: not ready, no new streams; open streams end (devices resend
// anything not acknowledged); the writer commits what is queued and
// acknowledges it as far as the streams are still there to hear it. Each
// stage waits at most Options.GracefulTimeout.
func (g *Gateway) shutdown(srv *grpc.Server, hs *http.Server) {
	g.ready.Store(false)
	g.stopping.Store(true)
	g.health.Shutdown()
	done := make(chan struct{})
	go func() { srv.GracefulStop(); close(done) }()
	// Make everything accepted so far durable, so each stream's last ack is
	// due before it is asked to end (the handler sends it on the way out).
	sctx, scancel := context.WithTimeout(context.Background(), g.opt.GracefulTimeout)
	if err := g.ingest.Flush(sctx); err != nil {
		g.log.Warn("shutdown: store flush", "err", err)
	}
	scancel()
	// Streams are long-lived: ask them to end now rather than wait for devices.
	g.ingest.EndStreams(errors.New("gateway shutting down"))
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
}

// Ready reports whether the gateway serves and its last store write
// committed (for tests and /readyz).
func (g *Gateway) Ready() bool { return g.ready.Load() && g.ingest.StoreFailure() == nil }

// watchdog runs every Options.WatchdogEvery: it lets time pass for the
// devices (ingest.Pipeline.Tick: alarm engines of devices without a stream,
// streams whose device stopped reading), probes a failed store so readiness
// comes back, and once an hour drops history older than the retention.
func (g *Gateway) watchdog(ctx context.Context) {
	t := time.NewTicker(g.opt.WatchdogEvery)
	defer t.Stop()
	var lastPrune time.Time
	var silent silentScan
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
		g.ingest.ProbeStore()
		silent.step(ctx, g)
		g.ingest.Tick(ctx)
	}
}

// audit queues an audit entry for the store (internal/auth and the web
// page audit through it).
func (g *Gateway) audit(ctx context.Context, actor, action, device, detail, remote string) {
	g.ingest.Audit(ctx, actor, action, device, detail, remote)
}

// ownerOf returns the address of the gateway that owns deviceID when it is
// not this one ("" = this one, or no sharding).
func (g *Gateway) ownerOf(deviceID string) string {
	if g.opt.Cluster != nil {
		return g.opt.Cluster.Owner(deviceID)
	}
	if g.ring == nil {
		return ""
	}
	if o := g.ring.Owner(deviceID); o != g.opt.Self {
		return o
	}
	return ""
}
