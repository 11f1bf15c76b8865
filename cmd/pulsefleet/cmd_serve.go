package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"path/filepath"
	"runtime/debug"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.yaml.in/yaml/v3"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/gateway"
	"github.com/pulsefleet/pulsefleet/internal/notify"
	"github.com/pulsefleet/pulsefleet/internal/profiles"
	"github.com/pulsefleet/pulsefleet/internal/shard"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// notCertified is printed at start-up (the web page shows the same text).
const notCertified = caution.Line

// serveConfig is everything `serve` needs; the YAML keys of --config are the
// flag names with '-' written as '_'.
type serveConfig struct {
	Data         string        `yaml:"data"`
	GRPCListen   string        `yaml:"grpc_listen"`
	HTTPListen   string        `yaml:"http_listen"`
	Profile      string        `yaml:"profile"`
	CaptureRaw   bool          `yaml:"capture_raw"`
	TrendDays    int           `yaml:"trend_days"`
	RawDays      int           `yaml:"raw_days"`
	LedgerDays   int           `yaml:"ledger_days"`
	BatchDelay   time.Duration `yaml:"batch_delay"`
	Insecure     bool          `yaml:"insecure"`
	TLSCert      string        `yaml:"tls_cert"`
	TLSKey       string        `yaml:"tls_key"`
	ClientCA     string        `yaml:"client_ca"`
	LogLevel     string        `yaml:"log_level"`
	RequireToken bool          `yaml:"require_tokens"`
	Peers        []string      `yaml:"peers"`
	Self         string        `yaml:"self"`
	VerifyStore  string        `yaml:"verify_store"`
	NewStore     bool          `yaml:"new_store"`
	// DeviceTimeRate: device seconds one stream may send per second.
	DeviceTimeRate float64       `yaml:"device_time_rate"`
	BackupDir      string        `yaml:"backup_dir"`
	BackupEvery    time.Duration `yaml:"backup_every"`
	BackupKeep     int           `yaml:"backup_keep"`
	ExportRate     int           `yaml:"export_rate"`
	// Notifications through Alertmanager (serve_notify.go).
	notifyConfig `yaml:",inline"`
	// A fleet on etcd (serve_cluster.go).
	clusterConfig `yaml:",inline"`
}

const (
	defaultGRPCListen = "127.0.0.1:7400"
	defaultHTTPListen = "127.0.0.1:7401"
)

func defaultDataDir() string {
	if d := os.Getenv("XDG_DATA_HOME"); d != "" {
		return filepath.Join(d, "pulsefleet")
	}
	if h, err := os.UserHomeDir(); err == nil {
		return filepath.Join(h, ".local", "share", "pulsefleet")
	}
	return "pulsefleet-data"
}

func (c *serveConfig) flags(fs *flag.FlagSet) {
	fs.StringVar(&c.Data, "data", c.Data, "data directory holding the store file (default "+defaultDataDir()+")")
	fs.StringVar(&c.GRPCListen, "grpc-listen", c.GRPCListen, "gRPC listen address for devices and operators")
	fs.StringVar(&c.HTTPListen, "http-listen", c.HTTPListen, "HTTP listen address for /metrics, /healthz, /readyz and the web page")
	fs.StringVar(&c.Profile, "profile", c.Profile, "default alarm profile: a built-in name ("+strings.Join(profiles.Names(), ", ")+") or a YAML file; a profile set through the API takes precedence")
	fs.BoolVar(&c.CaptureRaw, "capture-raw", c.CaptureRaw, "keep the raw samples of raw-mode devices (bounded by --raw-days)")
	fs.IntVar(&c.TrendDays, "trend-days", c.TrendDays, "days of trend history to keep (0 = forever)")
	fs.IntVar(&c.RawDays, "raw-days", c.RawDays, "days of raw captures to keep (0 = forever)")
	fs.IntVar(&c.LedgerDays, "ledger-days", c.LedgerDays, "days of the ingest ledger to keep (0 = forever; the default covers every resend the gateway can accept: device times up to a year old)")
	fs.DurationVar(&c.BatchDelay, "batch-delay", c.BatchDelay, "how long a store batch collects after its first message (under load, commits are also paced: starting at least 4x the previous commit's duration apart, never paced more than 30 ms apart)")
	fs.BoolVar(&c.Insecure, "insecure", c.Insecure, "allow plaintext listeners on non-loopback addresses")
	fs.StringVar(&c.TLSCert, "tls-cert", c.TLSCert, "TLS certificate file (PEM) for gRPC and HTTP")
	fs.StringVar(&c.TLSKey, "tls-key", c.TLSKey, "TLS private key file (PEM)")
	fs.StringVar(&c.ClientCA, "client-ca", c.ClientCA, "CA file (PEM): devices must present a certificate it signed")
	fs.BoolVar(&c.RequireToken, "require-tokens", c.RequireToken, "refuse every call without a valid bearer token even while none is issued. "+
		"Tokens are always required once any exists in the store, and whenever --tls-cert is given or a listener is not on loopback; "+
		"only a plaintext, loopback-only gateway with no token issued runs open for development (and says so at start-up)")
	fs.StringVar(&c.LogLevel, "log-level", c.LogLevel, "log level: debug, info, warn, error")
	fs.Var((*peersFlag)(&c.Peers), "peers", "comma-separated gRPC addresses of every gateway sharing the fleet (the same list on each); devices owned by another peer (rendezvous hashing) are redirected there")
	fs.StringVar(&c.VerifyStore, "verify-store", c.VerifyStore, "store check before serving: quick (always: meta pages, length, buckets, first and last records) or full (also `pulsefleet verify`: every page and record; takes a while on a big store)")
	fs.BoolVar(&c.NewStore, "new-store", c.NewStore, "start an empty store on purpose where pulsefleet.id says one was created but pulsefleet.db is missing or empty "+
		"(without it the gateway refuses: an empty store would hold no credential); refused when a store file with data is there")
	fs.Float64Var(&c.DeviceTimeRate, "device-time-rate", c.DeviceTimeRate, "device seconds one stream may send per second of real time (a backlog drains this fast; more is refused as rate limited and resent); "+
		"10 minutes of device time may come at once")
	fs.StringVar(&c.BackupDir, "backup-dir", c.BackupDir, "take scheduled snapshots of the store into this directory (pulsefleet-TIME.db with .sha256; see `pulsefleet backup`); empty takes none")
	fs.DurationVar(&c.BackupEvery, "backup-every", c.BackupEvery, "interval of scheduled snapshots, 1s..720h")
	fs.IntVar(&c.BackupKeep, "backup-keep", c.BackupKeep, "complete scheduled snapshots kept; older ones are removed")
	fs.IntVar(&c.ExportRate, "export-rate", c.ExportRate, "history points per second that exports through this gateway read together (so a long export leaves the cores to live ingest); 0 = no bound")
	c.notifyConfig.flags(fs)
	fs.StringVar(&c.Self, "self", c.Self, "this gateway's entry in --peers (default: the peer whose first DNS label is this host's name, as in a Kubernetes StatefulSet)")
	c.clusterFlags(fs)
}

// loadServeConfig reads a YAML config file; unknown keys and bad values are
// errors naming the key.
func loadServeConfig(path string, into *serveConfig) error {
	data, err := os.ReadFile(path)
	if err != nil {
		return fmt.Errorf("--config: %w", err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(into); err != nil && !errors.Is(err, io.EOF) {
		return configError(path, err)
	}
	return nil
}

func (c *serveConfig) validate() error {
	for _, f := range []struct{ key, v string }{{"grpc-listen", c.GRPCListen}, {"http-listen", c.HTTPListen}} {
		if _, _, err := net.SplitHostPort(f.v); err != nil {
			return fmt.Errorf("%s: %q is not host:port: %v", f.key, f.v, err)
		}
	}
	for _, f := range []struct {
		key string
		v   int
	}{{"trend-days", c.TrendDays}, {"raw-days", c.RawDays}, {"ledger-days", c.LedgerDays}} {
		if f.v < 0 || f.v > 36500 {
			return fmt.Errorf("%s: %d, want 0..36500 (0 = forever)", f.key, f.v)
		}
	}
	if c.DeviceTimeRate < 1 || c.DeviceTimeRate > 1e6 {
		return fmt.Errorf("device-time-rate: %v, want 1..1e6 device seconds per second", c.DeviceTimeRate)
	}
	if c.ExportRate < 0 {
		return fmt.Errorf("export-rate: %d, want >= 0 points/s (0 = no bound)", c.ExportRate)
	}
	if c.BatchDelay < time.Millisecond || c.BatchDelay > 2*time.Second {
		return fmt.Errorf("batch-delay: %v, want 1ms..2s", c.BatchDelay)
	}
	if (c.TLSCert == "") != (c.TLSKey == "") {
		return fmt.Errorf("tls-cert, tls-key: give both or neither")
	}
	if c.ClientCA != "" && c.TLSCert == "" {
		return fmt.Errorf("client-ca: needs --tls-cert and --tls-key")
	}
	if c.TLSCert == "" && !c.Insecure {
		for _, f := range []struct{ key, v string }{{"grpc-listen", c.GRPCListen}, {"http-listen", c.HTTPListen}} {
			if !isLoopback(f.v) {
				return fmt.Errorf("%s: %q is not a loopback address; without TLS pulsefleet listens only on loopback unless --insecure is given", f.key, f.v)
			}
		}
	}
	if len(c.Peers) > 0 {
		if _, err := shard.NewRing(c.Peers); err != nil {
			return fmt.Errorf("peers: %v", err)
		}
		if c.Self == "" {
			host, err := os.Hostname()
			if err != nil {
				return fmt.Errorf("self: not given and no hostname: %v", err)
			}
			if c.Self, err = shard.SelfFromHostname(host, c.Peers); err != nil {
				return fmt.Errorf("self: not given, and the hostname does not pick one of --peers: %v", err)
			}
		}
		found := false
		for _, p := range c.Peers {
			found = found || p == c.Self
		}
		if !found {
			return fmt.Errorf("self: %q is not one of --peers %v", c.Self, c.Peers)
		}
	} else if c.Self != "" {
		return fmt.Errorf("self: given without --peers")
	}
	if err := c.validateCluster(); err != nil {
		return err
	}
	if err := c.backups().Validate(); err != nil {
		return err
	}
	if err := c.notifyConfig.validate(); err != nil {
		return err
	}
	if c.VerifyStore != "quick" && c.VerifyStore != "full" {
		return fmt.Errorf("verify-store: %q, want quick or full", c.VerifyStore)
	}
	switch c.LogLevel {
	case "debug", "info", "warn", "error":
	default:
		return fmt.Errorf("log-level: %q, want debug, info, warn or error", c.LogLevel)
	}
	return nil
}

func isLoopback(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func defaultServeConfig() serveConfig {
	return serveConfig{Data: defaultDataDir(), GRPCListen: defaultGRPCListen, HTTPListen: defaultHTTPListen,
		Profile: "adult-ward-pilot", BatchDelay: 10 * time.Millisecond, LogLevel: "info", RawDays: 7, LedgerDays: defaultLedgerDays, VerifyStore: "quick", DeviceTimeRate: 30,
		BackupEvery: 24 * time.Hour, BackupKeep: 7, ExportRate: 100_000, notifyConfig: notifyConfig{AlertmanagerHold: notify.DefaultHold}}
}

func (c *serveConfig) backups() gateway.BackupSchedule {
	return gateway.BackupSchedule{Dir: c.BackupDir, Every: c.BackupEvery, Keep: c.BackupKeep}
}

// runningGateway describes a started gateway.
type runningGateway struct {
	GRPCAddr, HTTPAddr, DataDir string
	Mode                        string // "plaintext (loopback only)", "TLS", "mutual TLS"
	Auth                        string // credential enforcement (gateway.AuthMode)
	GW                          *gateway.Gateway
	DB                          *store.DB
}

// defaultLedgerDays keeps the ingest ledger longer than any message can be
// resent and accepted: the gateway refuses a device time more than 366 days
// behind its clock (internal/gateway/validate.go, maxClockSkew), so the
// ledger still holds every stored message a device could resend. Its
// ranges cost a few kB per device-day (README "Storage cost").
const defaultLedgerDays = 400

// startGateway opens the store, builds the gateway and starts serving; it
// returns once the listeners are bound, and stop() shuts down gracefully and
// closes the store. serve and demo share it.
// Long because it is one ordered start-up whose every failing step undoes the earlier ones in reverse order.
func startGateway(ctx context.Context, c serveConfig, logw io.Writer) (*runningGateway, func() error, error) {
	setGatewayGC()
	level := map[string]slog.Level{"debug": slog.LevelDebug, "info": slog.LevelInfo, "warn": slog.LevelWarn, "error": slog.LevelError}[c.LogLevel]
	log := slog.New(slog.NewTextHandler(logw, &slog.HandlerOptions{Level: level}))
	prof, err := loadProfileArg(c.Profile)
	if err != nil {
		return nil, nil, fmt.Errorf("--profile: %w", err)
	}
	if err := verifyStoreFull(c, logw); err != nil {
		return nil, nil, err
	}
	db, err := store.Open(c.Data, store.Options{NewStore: c.NewStore})
	if err != nil {
		return nil, nil, err
	}
	reg := prometheus.NewRegistry()
	if err := gateway.RegisterRuntime(reg); err != nil {
		db.Close()
		return nil, nil, err
	}
	warnCapacity(db, time.Now(), c.CaptureRaw, log)
	if err := reg.Register(newStoreCollector(db, c.CaptureRaw)); err != nil {
		db.Close()
		return nil, nil, err
	}
	opt := gateway.Options{Store: db, Registerer: reg, Logger: log, DefaultProfile: prof, CaptureRaw: c.CaptureRaw,
		BatchDelay: c.BatchDelay, ExportRate: exportRate(c.ExportRate), Peers: c.Peers, Self: c.Self, Retention: store.Retention{TrendDays: c.TrendDays, RawDays: c.RawDays, LedgerDays: c.LedgerDays},
		Backups: c.backups()}
	sec, err := securityOptions(c)
	if err != nil {
		db.Close()
		return nil, nil, err
	}
	sec.apply(&opt, c)
	leave := func() {}
	var fleet *fleetOnEtcd
	if len(c.Etcd) > 0 {
		if fleet, err = joinCluster(ctx, c, log, reg); err != nil {
			db.Close()
			return nil, nil, err
		}
		opt.Cluster, opt.ControlPlane, leave = fleet.node, fleet.plane, fleet.leave
	}
	gw, err := gateway.New(opt)
	if err == nil && fleet != nil {
		err = fleet.plane.Start(ctx, gw)
	}
	if err != nil {
		leave()
		db.Close()
		return nil, nil, err
	}
	gl, err := net.Listen("tcp", c.GRPCListen)
	if err != nil {
		leave()
		db.Close()
		return nil, nil, fmt.Errorf("grpc-listen %s: %w", c.GRPCListen, err)
	}
	hl, err := net.Listen("tcp", c.HTTPListen)
	if err != nil {
		gl.Close()
		leave()
		db.Close()
		return nil, nil, fmt.Errorf("http-listen %s: %w", c.HTTPListen, err)
	}
	hl = sec.wrapHTTP(hl)
	scheme := "http"
	if c.TLSCert != "" {
		scheme = "https"
	}
	stopNotify, err := startNotifier(c, db, reg, log, scheme+"://"+hl.Addr().String())
	if err != nil {
		hl.Close()
		gl.Close()
		leave()
		db.Close()
		return nil, nil, err
	}
	sctx, cancel := context.WithCancel(context.WithoutCancel(ctx))
	done := make(chan error, 1)
	go func() { done <- gw.Serve(sctx, gl, hl) }()
	rg := &runningGateway{GRPCAddr: gl.Addr().String(), HTTPAddr: hl.Addr().String(), DataDir: c.Data, Mode: sec.mode, Auth: gw.AuthMode(), GW: gw, DB: db}
	stop := func() error {
		cancel()
		err := <-done
		stopNotify() // after the gateway's last write
		leave()      // after the last stream ended: its fences go with the lease
		if cerr := db.Close(); err == nil {
			err = cerr
		}
		return err
	}
	return rg, stop, nil
}

// setGatewayGC sets the collector for a gateway's heap.
func setGatewayGC() {
	// A gateway's heap is mostly small per-stream state that lives as long
	// as the stream; collecting at 50 % growth instead of Go's default 100 %
	// keeps memory per connected device within 64 KiB at 5,000 raw streams
	// for a few percent more CPU (measured with bench). GOGC set in the
	// environment wins.
	if os.Getenv("GOGC") == "" {
		debug.SetGCPercent(50)
	}
}

// verifyStoreFull runs the full store check of --verify-store full on an
// existing store, and fails naming the first problem.
func verifyStoreFull(c serveConfig, logw io.Writer) error {
	if c.VerifyStore == "full" {
		if _, err := os.Stat(filepath.Join(c.Data, store.FileName)); err == nil {
			fmt.Fprintf(logw, "pulsefleet: full store check of %s (--verify-store full)...\n", c.Data)
			rep, err := store.VerifyDir(c.Data, store.VerifyOptions{MaxProblems: 10})
			if err != nil {
				return err
			}
			if !rep.OK() {
				return fmt.Errorf("store %s failed the full check (%d problem(s), first: %s): run `pulsefleet verify --data %s` for the list, then restore a backup",
					rep.Path, len(rep.Problems), rep.Problems[0], c.Data)
			}
		}
	}
	return nil
}

func init() {
	register(command{
		name:    "serve",
		summary: "Run the gateway: device ingest and fleet API over gRPC, metrics and the web page over HTTP.",
		run:     runServe,
	})
}

func runServe(ctx context.Context, args []string, s stdio) error {
	c := defaultServeConfig()
	fs := newFlagSet("serve", "[--data DIR] [--grpc-listen ADDR] [--http-listen ADDR] [--config FILE] [flags]", s.err)
	configPath := fs.String("config", "", "YAML config file; its keys are the flag names with _ for -; flags given on the command line override it")
	c.flags(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *configPath != "" {
		// Re-apply: file first, then the flags that were set explicitly.
		fromFile := defaultServeConfig()
		if err := loadServeConfig(*configPath, &fromFile); err != nil {
			return err
		}
		fs2 := flag.NewFlagSet("serve", flag.ContinueOnError)
		fs2.SetOutput(io.Discard)
		fs2.String("config", "", "")
		fromFile.flags(fs2)
		fs.Visit(func(f *flag.Flag) { _ = fs2.Set(f.Name, f.Value.String()) })
		c = fromFile
	}
	if err := c.validate(); err != nil {
		return usageError{err.Error()}
	}
	fmt.Fprintln(s.err, notCertified)
	rg, stop, err := startGateway(ctx, c, s.err)
	if err != nil {
		return err
	}
	scheme := "http"
	if c.TLSCert != "" {
		scheme = "https"
	}
	fmt.Fprintf(s.out, "pulsefleet serving (%s)\n  auth:    %s\n  data:    %s\n  gRPC:    %s\n  web:     %s://%s/\n  metrics: %s://%s/metrics\n",
		rg.Mode, rg.Auth, filepath.Join(rg.DataDir, store.FileName), rg.GRPCAddr, scheme, rg.HTTPAddr, scheme, rg.HTTPAddr)
	<-ctx.Done()
	fmt.Fprintln(s.err, "pulsefleet: shutting down (flushing the store)...")
	return stop()
}

// peersFlag is --peers: a comma-separated list that prints back the same way,
// so a --config file can be overridden by the flag.
type peersFlag []string

func (p *peersFlag) String() string { return strings.Join(*p, ",") }

func (p *peersFlag) Set(v string) error {
	l, err := shard.ParsePeers(v)
	if err != nil {
		return err
	}
	*p = l
	return nil
}

// exportRate maps --export-rate (0 = no bound) to gateway.Options.ExportRate
// (0 = the default, negative = no bound).
func exportRate(flagValue int) int {
	if flagValue == 0 {
		return -1
	}
	return flagValue
}
