package cluster

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"go.etcd.io/etcd/api/v3/v3rpc/rpctypes"
	clientv3 "go.etcd.io/etcd/client/v3"

	"github.com/pulsefleet/pulsefleet/internal/shard"
)

// DefaultTTL is the member lease's time to live: a gateway that stops
// renewing it (kill -9, power loss, cut off from etcd) leaves the member
// list, and gives up its device fences, this long after its last renewal.
const DefaultTTL = 3 * time.Second

// DefaultPrefix is the etcd key prefix of a fleet.
const DefaultPrefix = "/pulsefleet/"

// Config configures a Node.
type Config struct {
	Client *clientv3.Client // required; the caller closes it after Node.Close
	Prefix string           // key prefix; "" = DefaultPrefix
	Self   string           // this gateway's advertised gRPC address, host:port (required)
	TTL    time.Duration    // member lease TTL; 0 = DefaultTTL; at least 2 s (etcd's floor)
	// AcquireWait bounds how long Acquire waits for another gateway to let
	// go of a device; 0 = 2*TTL.
	AcquireWait time.Duration
	Registerer  prometheus.Registerer // nil = no metrics
	Log         *slog.Logger          // nil = slog.Default()
}

// Node is this gateway's membership in a fleet. Make it with Join; its
// methods are safe for concurrent use.
type Node struct {
	c      *clientv3.Client
	prefix string
	self   string
	ttl    time.Duration
	wait   time.Duration
	log    *slog.Logger
	m      *metrics

	ring  atomic.Pointer[shard.Ring] // live members; nil before the first list
	lease atomic.Int64               // current member lease; 0 while not registered

	mu      sync.Mutex
	members map[string]bool
	held    map[string]*hold // device id -> this gateway's fence

	alarmMu      sync.Mutex
	alarmPending map[string][]byte // device id -> newest alarm snapshot not yet in etcd (alarms.go)
	retired      map[string]bool   // devices retired through this gateway, not fenced since (retire.go)
	alarmKick    chan struct{}
	changed      chan struct{} // member list changed (MembersChanged)

	stop context.CancelFunc
	wg   sync.WaitGroup
}

// Join registers this gateway under a lease, reads the member list and
// keeps both current until Close.
func Join(ctx context.Context, cfg Config) (*Node, error) {
	if cfg.Client == nil {
		return nil, errors.New("cluster: Config.Client is nil")
	}
	if strings.TrimSpace(cfg.Self) == "" || strings.ContainsAny(cfg.Self, "/ ") {
		return nil, fmt.Errorf("cluster: advertised address %q: want host:port without spaces or slashes", cfg.Self)
	}
	if cfg.TTL == 0 {
		cfg.TTL = DefaultTTL
	}
	if cfg.TTL < 2*time.Second {
		return nil, fmt.Errorf("cluster: TTL %v, want at least 2s (etcd's shortest lease)", cfg.TTL)
	}
	if cfg.Prefix == "" {
		cfg.Prefix = DefaultPrefix
	}
	if cfg.AcquireWait == 0 {
		cfg.AcquireWait = 2 * cfg.TTL
	}
	if cfg.Log == nil {
		cfg.Log = slog.Default()
	}
	m, err := newMetrics(cfg.Registerer)
	if err != nil {
		return nil, err
	}
	n := &Node{c: cfg.Client, prefix: cfg.Prefix, self: cfg.Self, ttl: cfg.TTL, wait: cfg.AcquireWait,
		log: cfg.Log, m: m, members: map[string]bool{}, held: map[string]*hold{},
		alarmPending: map[string][]byte{}, retired: map[string]bool{}, alarmKick: make(chan struct{}, 1), changed: make(chan struct{}, 1)}
	if err := n.register(ctx); err != nil {
		return nil, err
	}
	rev, err := n.list(ctx)
	if err != nil {
		return nil, err
	}
	bg, stop := context.WithCancel(context.Background())
	n.stop = stop
	n.wg.Add(3)
	go func() { defer n.wg.Done(); n.publishAlarms(bg) }()
	go func() { defer n.wg.Done(); n.keepAlive(bg) }()
	go func() { defer n.wg.Done(); n.watchMembers(bg, rev+1) }()
	return n, nil
}

// Self is this gateway's advertised address.
func (n *Node) Self() string { return n.self }

// TTL is the member lease's time to live.
func (n *Node) TTL() time.Duration { return n.ttl }

// Members returns the live members, sorted.
func (n *Node) Members() []string {
	if r := n.ring.Load(); r != nil {
		return r.Peers()
	}
	return nil
}

// Owner returns the address of the member that owns deviceID when it is not
// this gateway; "" when it is this one (or before any member list).
func (n *Node) Owner(deviceID string) string {
	r := n.ring.Load()
	if r == nil {
		return ""
	}
	if o := r.Owner(deviceID); o != n.self {
		return o
	}
	return ""
}

// Close stops renewing and revokes the member lease, so the other members
// take this gateway's devices at once (rather than after the TTL) and its
// fences disappear. Call it after the last stream ended.
func (n *Node) Close() error {
	n.stop()
	n.wg.Wait()
	id := clientv3.LeaseID(n.lease.Swap(0))
	if id == 0 {
		return nil
	}
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	if _, err := n.c.Revoke(ctx, id); err != nil {
		return fmt.Errorf("cluster: leaving (revoke lease %x): %w; the others take over when it expires in %v", int64(id), err, n.ttl)
	}
	return nil
}

func (n *Node) memberKey(addr string) string { return n.prefix + "members/" + addr }

// register grants a new lease and puts this member under it.
func (n *Node) register(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	g, err := n.c.Grant(ctx, int64(n.ttl/time.Second))
	if err != nil {
		return fmt.Errorf("cluster: lease from etcd: %w", err)
	}
	if _, err := n.c.Put(ctx, n.memberKey(n.self), n.self, clientv3.WithLease(g.ID)); err != nil {
		return fmt.Errorf("cluster: registering %s: %w", n.self, err)
	}
	n.lease.Store(int64(g.ID))
	n.m.etcdUp.Set(1)
	n.log.Info("cluster: registered", "self", n.self, "lease_ttl_s", g.TTL)
	return nil
}

// list reads the member list and returns the revision it was read at.
func (n *Node) list(ctx context.Context) (int64, error) {
	ctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	resp, err := n.c.Get(ctx, n.prefix+"members/", clientv3.WithPrefix())
	if err != nil {
		return 0, fmt.Errorf("cluster: member list: %w", err)
	}
	set := map[string]bool{}
	for _, kv := range resp.Kvs {
		set[strings.TrimPrefix(string(kv.Key), n.prefix+"members/")] = true
	}
	n.setMembers(set)
	return resp.Header.Revision, nil
}

// keepAlive renews the lease every TTL/3. While etcd cannot be reached it
// keeps trying and keeps the fences it holds: no other member can take them
// before the lease expires in etcd. When etcd answers that the lease is gone
// (it expired while this gateway was cut off), every fence is lost, the
// streams are ended through their lost callbacks and the gateway registers
// again.
func (n *Node) keepAlive(ctx context.Context) {
	t := time.NewTicker(n.ttl / 3)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		id := clientv3.LeaseID(n.lease.Load())
		if id == 0 {
			if err := n.register(ctx); err != nil {
				n.m.etcdUp.Set(0)
				continue
			}
			if _, err := n.list(ctx); err != nil {
				n.log.Warn("cluster: member list after registering again", "err", err)
			}
			continue
		}
		kctx, cancel := context.WithTimeout(ctx, n.ttl/3)
		_, err := n.c.KeepAliveOnce(kctx, id)
		cancel()
		switch {
		case err == nil:
			n.m.etcdUp.Set(1)
		case errors.Is(err, rpctypes.ErrLeaseNotFound):
			n.m.etcdUp.Set(1)
			n.log.Error("cluster: member lease expired while cut off from etcd; ending every stream and registering again", "self", n.self)
			n.lease.CompareAndSwap(int64(id), 0)
			n.loseAll(ErrLeaseLost)
		case ctx.Err() == nil:
			n.m.etcdUp.Set(0)
			n.log.Warn("cluster: lease not renewed; keeping current streams", "err", err)
		}
	}
}

// watchMembers follows the member list from revision rev.
func (n *Node) watchMembers(ctx context.Context, rev int64) {
	for ctx.Err() == nil {
		wch := n.c.Watch(clientv3.WithRequireLeader(ctx), n.prefix+"members/", clientv3.WithPrefix(), clientv3.WithRev(rev))
		for wr := range wch {
			if err := wr.Err(); err != nil {
				n.log.Warn("cluster: member watch", "err", err)
				break
			}
			n.mu.Lock()
			set := make(map[string]bool, len(n.members))
			for k := range n.members {
				set[k] = true
			}
			n.mu.Unlock()
			for _, ev := range wr.Events {
				addr := strings.TrimPrefix(string(ev.Kv.Key), n.prefix+"members/")
				set[addr] = ev.Type == clientv3.EventTypePut
				if !set[addr] {
					delete(set, addr)
				}
			}
			n.setMembers(set)
			rev = wr.Header.Revision + 1
		}
		if ctx.Err() != nil {
			return
		}
		// The watch ended (no leader, compaction): read the list again.
		for ctx.Err() == nil {
			r, err := n.list(ctx)
			if err == nil {
				rev = r + 1
				break
			}
			select {
			case <-ctx.Done():
			case <-time.After(n.ttl / 3):
			}
		}
	}
}

// setMembers installs a new member list and lets go of the devices this
// gateway no longer owns (their streams end; the devices reconnect and are
// redirected to their new owner).
func (n *Node) setMembers(set map[string]bool) {
	peers := make([]string, 0, len(set))
	for p := range set {
		peers = append(peers, p)
	}
	slices.Sort(peers)
	var ring *shard.Ring
	if len(peers) > 0 {
		r, err := shard.NewRing(peers)
		if err != nil {
			n.log.Error("cluster: member list", "err", err)
			return
		}
		ring = r
	}
	n.mu.Lock()
	old := n.members
	n.members = set
	n.ring.Store(ring)
	var moved []*hold
	for id, h := range n.held {
		if ring != nil && ring.Owner(id) != n.self {
			moved = append(moved, h)
		}
	}
	n.mu.Unlock()
	n.m.members.Set(float64(len(peers)))
	if !mapsEqual(old, set) {
		n.log.Info("cluster: members", "members", peers, "devices_moving_away", len(moved))
		select {
		case n.changed <- struct{}{}:
		default:
		}
	}
	for _, h := range moved {
		if ring != nil {
			h.lose(&MovedError{Device: h.device, Owner: ring.Owner(h.device)})
		}
	}
}

func mapsEqual(a, b map[string]bool) bool {
	if len(a) != len(b) {
		return false
	}
	for k := range a {
		if !b[k] {
			return false
		}
	}
	return true
}

// metrics of a node.
type metrics struct {
	members prometheus.Gauge
	etcdUp  prometheus.Gauge
	fences  prometheus.Gauge
	waits   prometheus.Counter
	// resent.go
	dropped    prometheus.Counter
	reconciled prometheus.Gauge
}

func newMetrics(reg prometheus.Registerer) (*metrics, error) {
	m := &metrics{
		members: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_cluster_members",
			Help: "Live gateways in the member list in etcd, as this gateway last saw it."}),
		etcdUp: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_cluster_etcd_up",
			Help: "1 when the last renewal of this gateway's member lease in etcd succeeded, 0 otherwise."}),
		fences: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_cluster_fences_held",
			Help: "Devices whose fence in etcd this gateway holds (its open device streams)."}),
		waits: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_cluster_fence_waits_total",
			Help: "Stream starts that found the device's fence held by another gateway and waited for it."}),
		dropped: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_cluster_resent_dropped_total",
			Help: "Messages this gateway dropped from its store after a restart because another gateway holds them (the device resent them there: this gateway's acknowledgement never reached it)."}),
		reconciled: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_cluster_resent_reconciled",
			Help: "1 once every other live gateway has answered which of this gateway's newest messages it holds (after this gateway's start), 0 before."}),
	}
	if reg != nil {
		for _, c := range []prometheus.Collector{m.members, m.etcdUp, m.fences, m.waits, m.dropped, m.reconciled} {
			if err := reg.Register(c); err != nil {
				return nil, fmt.Errorf("cluster: metrics: %w", err)
			}
		}
	}
	return m, nil
}
