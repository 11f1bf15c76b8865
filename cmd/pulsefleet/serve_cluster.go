package main

import (
	"context"
	"flag"
	"fmt"
	"log/slog"
	"net"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.etcd.io/etcd/client/pkg/v3/transport"
	clientv3 "go.etcd.io/etcd/client/v3"
	"go.uber.org/zap"
	"google.golang.org/grpc"
	"google.golang.org/grpc/backoff"

	"github.com/pulsefleet/pulsefleet/internal/cluster"
	"github.com/pulsefleet/pulsefleet/internal/controlplane"
)

// clusterConfig is serve's part for a fleet on etcd.
type clusterConfig struct {
	Etcd       []string `yaml:"etcd"`
	EtcdPrefix string   `yaml:"etcd_prefix"`
	EtcdCA     string   `yaml:"etcd_ca"`
	EtcdCert   string   `yaml:"etcd_cert"`
	EtcdKey    string   `yaml:"etcd_key"`
	Advertise  string   `yaml:"advertise"`
}

// clusterFlags are serve's etcd flags (a fleet of gateways on etcd).
func (c *serveConfig) clusterFlags(fs *flag.FlagSet) {
	fs.Var((*listFlag)(&c.Etcd), "etcd", "comma-separated etcd client URLs (http://host:2379 or https://...): join the fleet whose members, device owners and fences are kept there (package cluster); excludes --peers")
	fs.StringVar(&c.EtcdPrefix, "etcd-prefix", c.EtcdPrefix, "etcd key prefix of this fleet, a path ending in / (several fleets can share one etcd; default "+cluster.DefaultPrefix+")")
	fs.StringVar(&c.EtcdCA, "etcd-ca", c.EtcdCA, "CA file (PEM) that signed etcd's server certificate")
	fs.StringVar(&c.EtcdCert, "etcd-cert", c.EtcdCert, "client certificate file (PEM) for etcd")
	fs.StringVar(&c.EtcdKey, "etcd-key", c.EtcdKey, "client key file (PEM) for etcd")
	fs.StringVar(&c.Advertise, "advertise", c.Advertise, "host:port devices and the other gateways reach this gateway's gRPC at (required with --etcd; devices owned here are redirected to it)")
}

// validateCluster checks the etcd flags.
func (c *serveConfig) validateCluster() error {
	if len(c.Etcd) == 0 {
		for _, f := range []struct{ key, v string }{{"advertise", c.Advertise}, {"etcd-ca", c.EtcdCA}, {"etcd-cert", c.EtcdCert}, {"etcd-key", c.EtcdKey}} {
			if f.v != "" {
				return fmt.Errorf("%s: given without --etcd", f.key)
			}
		}
		return nil
	}
	if c.EtcdPrefix == "" {
		c.EtcdPrefix = cluster.DefaultPrefix
	}
	if len(c.Peers) > 0 {
		return fmt.Errorf("peers: exclusive with --etcd (the members in etcd are the peer list)")
	}
	for i, e := range c.Etcd {
		if !strings.HasPrefix(e, "http://") && !strings.HasPrefix(e, "https://") {
			return fmt.Errorf("etcd: endpoint %d %q: want http://host:port or https://host:port", i+1, e)
		}
	}
	if c.Advertise == "" {
		return fmt.Errorf("advertise: required with --etcd: the host:port other gateways redirect this gateway's devices to")
	}
	if h, p, err := net.SplitHostPort(c.Advertise); err != nil || h == "" || p == "0" {
		return fmt.Errorf("advertise: %q is not a reachable host:port (no empty host, no port 0)", c.Advertise)
	}
	if (c.EtcdCert == "") != (c.EtcdKey == "") {
		return fmt.Errorf("etcd-cert, etcd-key: give both or neither")
	}
	if !strings.HasPrefix(c.EtcdPrefix, "/") || !strings.HasSuffix(c.EtcdPrefix, "/") {
		return fmt.Errorf("etcd-prefix: %q, want a path starting and ending with /", c.EtcdPrefix)
	}
	return nil
}

// fleetOnEtcd is a gateway's membership and shared control plane.
type fleetOnEtcd struct {
	node  *cluster.Node
	plane *controlplane.Plane
	cli   *clientv3.Client
	log   *slog.Logger
}

// joinCluster connects to etcd and registers this gateway; start the
// control plane with startPlane once the gateway exists, and leave after
// the gateway stopped.
func joinCluster(ctx context.Context, c serveConfig, log *slog.Logger, reg prometheus.Registerer) (*fleetOnEtcd, error) {
	cfg := clientv3.Config{Endpoints: c.Etcd, DialTimeout: 5 * time.Second, Logger: zap.NewNop(),
		DialKeepAliveTime: 2 * time.Second, DialKeepAliveTimeout: 2 * time.Second,
		// gRPC's reconnect backoff grows to 120 s by default: after an etcd
		// outage the control plane (and /readyz) would come back only when
		// the next attempt happens. Capped at 2 s, it returns within
		// seconds of etcd, as README promises.
		DialOptions: []grpc.DialOption{grpc.WithConnectParams(grpc.ConnectParams{
			Backoff:           backoff.Config{BaseDelay: 100 * time.Millisecond, Multiplier: 1.6, Jitter: 0.2, MaxDelay: 2 * time.Second},
			MinConnectTimeout: 2 * time.Second,
		})}}
	if c.EtcdCA != "" || c.EtcdCert != "" {
		ti := transport.TLSInfo{TrustedCAFile: c.EtcdCA, CertFile: c.EtcdCert, KeyFile: c.EtcdKey}
		var err error
		if cfg.TLS, err = ti.ClientConfig(); err != nil {
			return nil, fmt.Errorf("etcd TLS: %w", err)
		}
	}
	cli, err := clientv3.New(cfg)
	if err != nil {
		return nil, fmt.Errorf("etcd %v: %w", c.Etcd, err)
	}
	jctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	node, err := cluster.Join(jctx, cluster.Config{Client: cli, Prefix: c.EtcdPrefix, Self: c.Advertise, Registerer: reg, Log: log})
	if err != nil {
		cli.Close()
		return nil, fmt.Errorf("etcd %v: %w", strings.Join(c.Etcd, ","), err)
	}
	plane, err := controlplane.New(controlplane.Config{Client: cli, Prefix: c.EtcdPrefix, Self: c.Advertise, Registerer: reg, Log: log})
	if err != nil {
		node.Close()
		cli.Close()
		return nil, err
	}
	log.Info("joined the fleet in etcd", "advertise", c.Advertise, "members", node.Members(), "lease_ttl", node.TTL())
	return &fleetOnEtcd{node: node, plane: plane, cli: cli, log: log}, nil
}

// leave stops the control plane, revokes the membership and closes the
// client (after the last stream ended: the fences go with the lease).
func (f *fleetOnEtcd) leave() {
	f.plane.Close()
	if err := f.node.Close(); err != nil {
		f.log.Warn("leaving the fleet", "err", err)
	}
	f.cli.Close()
}

// listFlag is a comma-separated list flag that prints back the same way.
type listFlag []string

func (l *listFlag) String() string { return strings.Join(*l, ",") }

func (l *listFlag) Set(v string) error {
	*l = nil
	for _, s := range strings.Split(v, ",") {
		if s = strings.TrimSpace(s); s != "" {
			*l = append(*l, s)
		}
	}
	return nil
}
