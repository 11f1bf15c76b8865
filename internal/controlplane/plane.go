package controlplane

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	clientv3 "go.etcd.io/etcd/client/v3"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// ErrUnreachable wraps every change refused because etcd does not answer.
var ErrUnreachable = errors.New("the fleet's control plane (etcd) is unreachable: control-plane changes are refused until it is back; nothing was changed")

// Applier takes the changes of the control plane (the gateway). from is
// the gateway that took the change.
type Applier interface {
	ApplyToken(t store.Token, from string) error
	ApplyProfile(pr Profile, from string) error
	ApplyCalibration(c store.Calibration, from string) error
	ApplyAssignment(a Assignment, from string) error
	ApplyLabels(l Labels, from string) error
}

// Profile is a shared alarm profile: the fleet's default (Device "") or
// one device's.
type Profile struct {
	Device string `json:"device,omitempty"`
	YAML   []byte `json:"yaml"`
	Actor  string `json:"actor"`  // who set it
	Reason string `json:"reason"` // why, as given
}

// Config configures a Plane.
type Config struct {
	Client     *clientv3.Client // required
	Prefix     string           // the fleet's key prefix (as package cluster's), "" = /pulsefleet/
	Self       string           // this gateway's advertised address (named in audit entries)
	Timeout    time.Duration    // of one write or probe; 0 = 2 s
	Registerer prometheus.Registerer
	Log        *slog.Logger
}

// Plane is one gateway's side of the shared control plane.
type Plane struct {
	cfg     Config
	up      atomic.Bool
	since   atomic.Int64 // unix ms of the last change of up
	lastErr atomic.Pointer[string]
	upG     prometheus.Gauge
	applied prometheus.Counter
	stop    context.CancelFunc
	wg      sync.WaitGroup
}

// New makes a plane; Start loads and follows the shared settings.
func New(cfg Config) (*Plane, error) {
	if cfg.Client == nil {
		return nil, errors.New("controlplane: Config.Client is nil")
	}
	if cfg.Prefix == "" {
		cfg.Prefix = "/pulsefleet/"
	}
	if cfg.Timeout == 0 {
		cfg.Timeout = 2 * time.Second
	}
	if cfg.Log == nil {
		cfg.Log = slog.Default()
	}
	p := &Plane{cfg: cfg,
		upG: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_controlplane_up",
			Help: "1 while the fleet's shared control plane (etcd) answers, 0 while this gateway serves with its last known settings and refuses control-plane changes."}),
		applied: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_controlplane_changes_applied_total",
			Help: "Shared control-plane changes taken by other gateways and applied here."}),
	}
	if cfg.Registerer != nil {
		for _, c := range []prometheus.Collector{p.upG, p.applied} {
			if err := cfg.Registerer.Register(c); err != nil {
				return nil, fmt.Errorf("controlplane: metrics: %w", err)
			}
		}
	}
	p.setUp(true, nil)
	return p, nil
}

func (p *Plane) key(parts ...string) string {
	return p.cfg.Prefix + "cp/" + strings.Join(parts, "/")
}

type tokenEntry struct {
	Gateway string      `json:"gateway"`
	Token   store.Token `json:"token"`
}

type profileEntry struct {
	Gateway string  `json:"gateway"`
	Profile Profile `json:"profile"`
}

// defaultKey names the fleet's default profile among device ids (which
// never start with '_': internal/ids).
const defaultKey = "_default"

// Start applies every shared setting to a (the snapshot), then follows
// changes until Close.
func (p *Plane) Start(ctx context.Context, a Applier) error {
	ctx2, cancel := context.WithTimeout(ctx, 5*p.cfg.Timeout)
	defer cancel()
	resp, err := p.cfg.Client.Get(ctx2, p.cfg.Prefix+"cp/", clientv3.WithPrefix())
	if err != nil {
		return fmt.Errorf("controlplane: reading the shared settings: %w", err)
	}
	// In the order they were written, so a calibration is applied before
	// an assignment naming it (keys sort otherwise).
	sort.SliceStable(resp.Kvs, func(i, j int) bool { return resp.Kvs[i].ModRevision < resp.Kvs[j].ModRevision })
	for _, kv := range resp.Kvs {
		p.apply(a, string(kv.Key), kv.Value)
	}
	bg, stop := context.WithCancel(context.Background())
	p.stop = stop
	p.wg.Add(2)
	go func() { defer p.wg.Done(); p.watch(bg, a, resp.Header.Revision+1) }()
	go func() { defer p.wg.Done(); p.probe(bg) }()
	return nil
}

// Close stops following the shared settings.
func (p *Plane) Close() {
	if p.stop != nil {
		p.stop()
	}
	p.wg.Wait()
}

func (p *Plane) apply(a Applier, key string, v []byte) {
	var from string
	var err error
	switch {
	case strings.HasPrefix(key, p.key("tokens")+"/"):
		var e tokenEntry
		if err = json.Unmarshal(v, &e); err == nil {
			from, err = e.Gateway, a.ApplyToken(e.Token, e.Gateway)
		}
	case strings.HasPrefix(key, p.key("profiles")+"/"):
		var e profileEntry
		if err = json.Unmarshal(v, &e); err == nil {
			from, err = e.Gateway, a.ApplyProfile(e.Profile, e.Gateway)
		}
	case strings.HasPrefix(key, p.key("calibrations")+"/"):
		var e calibrationEntry
		if err = json.Unmarshal(v, &e); err == nil {
			from, err = e.Gateway, a.ApplyCalibration(e.Calibration, e.Gateway)
		}
	case strings.HasPrefix(key, p.key("calassign")+"/"):
		var e assignmentEntry
		if err = json.Unmarshal(v, &e); err == nil {
			from, err = e.Gateway, a.ApplyAssignment(e.Assignment, e.Gateway)
		}
	case strings.HasPrefix(key, p.key("labels")+"/"):
		var e labelsEntry
		if err = json.Unmarshal(v, &e); err == nil {
			from, err = e.Gateway, a.ApplyLabels(e.Labels, e.Gateway)
		}
	default:
		return // a kind of setting this release does not know
	}
	if err != nil {
		p.cfg.Log.Error("controlplane: shared setting not applied", "key", key, "err", err)
		return
	}
	if from != p.cfg.Self {
		p.applied.Inc()
	}
}

func (p *Plane) watch(ctx context.Context, a Applier, rev int64) {
	for ctx.Err() == nil {
		for wr := range p.cfg.Client.Watch(clientv3.WithRequireLeader(ctx), p.cfg.Prefix+"cp/", clientv3.WithPrefix(), clientv3.WithRev(rev)) {
			if err := wr.Err(); err != nil {
				p.cfg.Log.Warn("controlplane: watch", "err", err)
				break
			}
			for _, ev := range wr.Events {
				if ev.Type == clientv3.EventTypePut {
					p.apply(a, string(ev.Kv.Key), ev.Kv.Value)
				}
			}
			rev = wr.Header.Revision + 1
		}
		select {
		case <-ctx.Done():
		case <-time.After(500 * time.Millisecond):
		}
	}
}

// probe checks every second that etcd answers.
func (p *Plane) probe(ctx context.Context) {
	t := time.NewTicker(time.Second)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		pctx, cancel := context.WithTimeout(ctx, p.cfg.Timeout)
		_, err := p.cfg.Client.Get(pctx, p.key("probe"), clientv3.WithCountOnly())
		cancel()
		if ctx.Err() == nil {
			p.setUp(err == nil, err)
		}
	}
}

func (p *Plane) setUp(up bool, err error) {
	was := p.up.Swap(up)
	if first := p.since.Load() == 0; first || was != up {
		p.since.Store(time.Now().UnixMilli())
		switch {
		case !up:
			p.cfg.Log.Warn("controlplane: etcd unreachable; serving with the last known settings, refusing changes", "err", err)
		case !first:
			p.cfg.Log.Info("controlplane: etcd answers again")
		}
	}
	if err != nil {
		s := err.Error()
		p.lastErr.Store(&s)
	}
	if up {
		p.upG.Set(1)
	} else {
		p.upG.Set(0)
	}
}

// Status says whether the control plane answers, and since when not.
func (p *Plane) Status() (up bool, detail string) {
	if p.up.Load() {
		return true, ""
	}
	since := time.UnixMilli(p.since.Load()).UTC().Format(time.RFC3339)
	last := ""
	if e := p.lastErr.Load(); e != nil {
		last = ": " + *e
	}
	return false, "control plane (etcd) unreachable since " + since + last + "; serving with the last known settings, control-plane changes refused"
}

// PublishToken writes a credential (new or revoked) for the whole fleet.
// It fails with ErrUnreachable when etcd does not answer; then the caller
// must not apply the change locally either.
func (p *Plane) PublishToken(ctx context.Context, t store.Token) error {
	return p.publish(ctx, p.key("tokens", t.Hash), tokenEntry{Gateway: p.cfg.Self, Token: t})
}

// PublishProfile writes an alarm profile for the whole fleet (the default
// one when pr.Device is ""), failing like PublishToken.
func (p *Plane) PublishProfile(ctx context.Context, pr Profile) error {
	k := pr.Device
	if k == "" {
		k = defaultKey
	}
	return p.publish(ctx, p.key("profiles", k), profileEntry{Gateway: p.cfg.Self, Profile: pr})
}

func (p *Plane) publish(ctx context.Context, key string, entry any) error {
	if !p.up.Load() {
		return ErrUnreachable
	}
	v, err := json.Marshal(entry)
	if err != nil {
		return err
	}
	ctx, cancel := context.WithTimeout(ctx, p.cfg.Timeout)
	defer cancel()
	if _, err := p.cfg.Client.Put(ctx, key, string(v)); err != nil {
		p.setUp(false, err)
		return fmt.Errorf("%w (%v)", ErrUnreachable, err)
	}
	return nil
}

// Self is the gateway named in audit entries of changes it takes.
func (p *Plane) Self() string { return p.cfg.Self }
