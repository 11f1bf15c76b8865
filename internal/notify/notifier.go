package notify

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Store is what the notifier needs of the history store (*store.DB).
type Store interface {
	Outbox(limit int) ([]store.OutboxEntry, int, error)
	OutboxAccepted(target string, targets []string, accepted []store.OutboxAcceptance) (int, error)
	OutboxDrop(episode uint64) (bool, error)
	Episode(id uint64) (store.Episode, error)
	Episodes(f store.EpisodeFilter) ([]store.Episode, error)
	Device(id string) (store.Device, error)
}

// Options configure a Notifier. Zero durations take the defaults named.
type Options struct {
	// URLs of the Alertmanagers; every one gets every alert (a highly
	// available Alertmanager cluster deduplicates them). Required.
	URLs []string
	Auth Auth
	// Store holds the outbox; required.
	Store Store
	// Gateway is the gateway label of every alert (this gateway's name);
	// with Fleet, an annotation.
	Gateway string
	// Fleet is set on a gateway of a fleet on etcd: alerts are identified
	// the same on every gateway (BuildFleet), and an active episode whose
	// device moved to another gateway (store.Device.MovedTo) is no longer
	// resent from here: it goes on there, and that gateway sends it (its
	// end is not known here, so no resolution is sent either).
	Fleet bool
	// PageBase is the web page's external URL, for the device-page link.
	PageBase string
	// Resend is how often active alerts are sent again; 0 means 1 minute,
	// a fifth of Alertmanager's default resolve_timeout (5 minutes), so
	// four resends in a row may fail before Alertmanager would resolve an
	// alert on its own.
	Resend time.Duration
	// Hold is how long an alert stays firing at an Alertmanager that had
	// not seen it firing before the episode ended (it was unreachable, or
	// the gateway was down) before its resolution is sent, so Alertmanager
	// notifies the alarm (after its group_wait) instead of receiving it
	// already resolved, which it never notifies. 0 means DefaultHold.
	Hold time.Duration
	// BackoffMin and BackoffMax bound the wait before a failed target is
	// tried again (doubling from min to max); 0 means 1 s and 30 s.
	BackoffMin, BackoffMax time.Duration
	// Timeout bounds one request; 0 means 10 s.
	Timeout time.Duration
	// Now is the clock; nil means time.Now.
	Now func() time.Time
	// Metrics from NewMetrics; nil registers nowhere.
	Metrics *Metrics
	Logger  *slog.Logger
}

// Notifier delivers the store's outbox to Alertmanager. Run owns its
// goroutines; Kick may be called from anywhere.
type Notifier struct {
	opt     Options
	clients []*client
	targets []string
	kicks   []chan struct{}
	m       *Metrics

	mu     sync.Mutex
	firing map[uint64][]Alert // episode -> its alerts as last built while active (resent every Resend)
	// held[i]: ended episodes that target i has firing only until their
	// hold is over (sent late, or ended within the hold of their firing):
	// resent to that target alone, so an Alertmanager restarted meanwhile
	// has them firing again before their resolution comes.
	held []map[uint64]Alert

	qmu sync.Mutex // one outbox read and gauge set at a time (readQueue)
}

// New checks the options and builds a notifier.
func New(opt Options) (*Notifier, error) {
	if len(opt.URLs) == 0 {
		return nil, errors.New("notify: no Alertmanager URL")
	}
	if opt.Store == nil {
		return nil, errors.New("notify: Options.Store is required")
	}
	if err := opt.Auth.Check(); err != nil {
		return nil, err
	}
	if opt.Resend == 0 {
		opt.Resend = time.Minute
	}
	if opt.Hold == 0 {
		opt.Hold = DefaultHold
	}
	if err := CheckHold(opt.Hold); err != nil {
		return nil, err
	}
	if opt.BackoffMin == 0 {
		opt.BackoffMin = time.Second
	}
	if opt.BackoffMax == 0 {
		opt.BackoffMax = 30 * time.Second
	}
	if opt.Timeout == 0 {
		opt.Timeout = 10 * time.Second
	}
	if opt.Now == nil {
		opt.Now = time.Now
	}
	if opt.Logger == nil {
		opt.Logger = slog.New(slog.DiscardHandler)
	}
	n := &Notifier{opt: opt, m: opt.Metrics, firing: map[uint64][]Alert{}}
	if n.m == nil {
		n.m, _ = NewMetrics(prometheus.NewRegistry())
	}
	now := opt.Now
	n.m.now.Store(&now)
	seen := map[string]bool{}
	for _, raw := range opt.URLs {
		u, err := ParseURL(raw)
		if err != nil {
			return nil, err
		}
		if seen[u] {
			return nil, fmt.Errorf("alertmanager: %s is given twice", u)
		}
		seen[u] = true
		c, err := newClient(u, opt.Auth, opt.Timeout)
		if err != nil {
			return nil, err
		}
		n.clients = append(n.clients, c)
		n.targets = append(n.targets, u)
		n.kicks = append(n.kicks, make(chan struct{}, 1))
		n.held = append(n.held, map[uint64]Alert{})
	}
	return n, nil
}

// DefaultHold is Options.Hold's default: 2 minutes, four times the
// group_wait (30 s) of the example configuration in deploy/alertmanager.
const DefaultHold = 2 * time.Minute

// Bounds of Options.Hold.
const (
	MinHold = 5 * time.Second
	MaxHold = 30 * time.Minute
)

// CheckHold checks a hold against MinHold and MaxHold.
func CheckHold(d time.Duration) error {
	if d < MinHold || d > MaxHold {
		return fmt.Errorf("alertmanager-hold: %s is out of range [%s, %s] (keep it above the group_wait of Alertmanager's routes)", d, MinHold, MaxHold)
	}
	return nil
}

// Targets are the Alertmanager URLs, as the outbox names them.
func (n *Notifier) Targets() []string { return append([]string(nil), n.targets...) }

// Kick tells the notifier that the outbox has new entries (it never blocks).
func (n *Notifier) Kick() {
	for _, k := range n.kicks {
		select {
		case k <- struct{}{}:
		default:
		}
	}
}

// Run delivers until ctx ends: one goroutine per Alertmanager, each going
// through the outbox on every kick, after a failure when its backoff
// expires, and every Resend (when it also sends the active alerts again).
// It returns when all of them have stopped. What is still in the outbox
// stays there for the next Run.
func (n *Notifier) Run(ctx context.Context) error {
	if err := n.loadFiring(); err != nil {
		return err
	}
	var wg sync.WaitGroup
	for i := range n.clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			n.work(ctx, i)
		}()
	}
	wg.Wait()
	for _, c := range n.clients {
		c.close()
	}
	return nil
}

// loadFiring seeds the resend set with the stored active, announced
// episodes (after a restart, Alertmanager may have lost them too).
func (n *Notifier) loadFiring() error {
	eps, err := n.opt.Store.Episodes(store.EpisodeFilter{ActiveOnly: true})
	if err != nil {
		return fmt.Errorf("notify: active episodes: %w", err)
	}
	now := n.opt.Now()
	devs := map[string]*store.Device{}
	n.mu.Lock()
	defer n.mu.Unlock()
	for i := range eps {
		e := &eps[i]
		if e.AnnouncedMS <= 0 {
			continue
		}
		n.firing[e.ID] = n.build(e, n.device(devs, e.Device), now)[:1]
	}
	return nil
}

// build is Build, or BuildFleet with Options.Fleet.
func (n *Notifier) build(e *store.Episode, dev *store.Device, now time.Time) []Alert {
	if n.opt.Fleet {
		return BuildFleet(e, dev, n.opt.Gateway, n.opt.PageBase, now)
	}
	return Build(e, dev, n.opt.Gateway, n.opt.PageBase, now)
}

// device reads a device record once per pass (nil when unknown).
func (n *Notifier) device(cache map[string]*store.Device, id string) *store.Device {
	if d, ok := cache[id]; ok {
		return d
	}
	var dp *store.Device
	if d, err := n.opt.Store.Device(id); err == nil {
		dp = &d
	}
	cache[id] = dp
	return dp
}

// work is target i's loop.
func (n *Notifier) work(ctx context.Context, i int) {
	target := n.targets[i]
	backoff := time.Duration(0)
	retry := time.NewTimer(0) // first pass at once: the outbox may hold what a previous run left
	resend := time.NewTicker(n.opt.Resend)
	defer retry.Stop()
	defer resend.Stop()
	hold := time.NewTimer(time.Hour) // the next end of a hold (an ended episode's resolution is due)
	hold.Stop()
	defer hold.Stop()
	ready := true
	for {
		resending := false
		select {
		case <-ctx.Done():
			return
		case <-n.kicks[i]:
		case <-retry.C:
			ready = true
		case <-resend.C:
			resending = true
		case <-hold.C:
		}
		if !ready {
			n.refreshQueue() // the gauges move while this target waits out its backoff
			continue
		}
		due, err := n.pass(ctx, i)
		if !due.IsZero() {
			hold.Reset(max(due.Sub(n.opt.Now()), 0) + 10*time.Millisecond)
		}
		if err == nil && resending {
			err = n.resend(ctx, i)
		}
		if ctx.Err() != nil {
			return
		}
		if err != nil {
			n.m.failed.WithLabelValues(target).Inc()
			backoff = min(max(2*backoff, n.opt.BackoffMin), n.opt.BackoffMax)
			n.opt.Logger.Warn("alertmanager did not accept alerts; will retry", "alertmanager", target, "retry_in", backoff, "err", err)
			ready = false
			retry.Reset(backoff)
			continue
		}
		backoff = 0
	}
}

// passBatch bounds the notifications of one request (about 1 KiB of JSON
// each) and of one store transaction recording their acceptance: the
// transaction's fsync, not the request, is what a drain waits for.
const passBatch = 256

// pass sends target every outbox entry it has not accepted yet, in
// batches, and records what it accepted. It stops at the first failure.
// An ended episode that target never had firing is sent as firing first
// (Late), and an ended episode's resolution only once it has been firing
// there for Options.Hold (also one that ended soon after its firing was
// delivered: Alertmanager, still in its group_wait, would drop it
// unnotified); pass returns the earliest such time still to come (zero
// when none), when it must run again.
func (n *Notifier) pass(ctx context.Context, i int) (time.Time, error) {
	c, target := n.clients[i], n.targets[i]
	var due time.Time
	ents, _, err := n.readQueue()
	if err != nil {
		return due, err
	}
	now := n.opt.Now()
	devs := map[string]*store.Device{}
	var (
		alerts []Alert
		sent   []store.OutboxAcceptance
	)
	flush := func() error {
		if len(sent) == 0 {
			return nil
		}
		if err := c.post(ctx, alerts); err != nil {
			return err
		}
		n.m.sent.WithLabelValues(target).Add(float64(len(alerts)))
		if _, err := n.opt.Store.OutboxAccepted(target, n.targets, sent); err != nil {
			return err
		}
		alerts, sent = alerts[:0], sent[:0]
		return nil
	}
	for _, ent := range ents {
		if delivered(ent, target) {
			continue
		}
		ep, err := n.opt.Store.Episode(ent.Episode)
		if errors.Is(err, store.ErrNotFound) {
			// Deleted (a participant's data removed): nothing left to tell.
			n.opt.Logger.Warn("outbox entry of a deleted episode dropped", "episode", ent.Episode)
			if _, err := n.opt.Store.OutboxDrop(ent.Episode); err != nil {
				return due, err
			}
			continue
		} else if err != nil {
			return due, err
		}
		as := n.build(&ep, n.device(devs, ep.Device), now)
		acc := store.OutboxAcceptance{Episode: ent.Episode, Gen: ent.Gen}
		n.track(&ep, as)
		if ep.Active {
			acc.FiringMS = now.UnixMilli()
		} else if firedMS, ok := ent.FiredAt(target); !ok {
			// Announced and ended before target ever had it firing.
			as = []Alert{Late(as[0], now.Add(n.opt.Hold+n.opt.Resend))}
			acc.FiringMS, acc.Partial = now.UnixMilli(), true
			due = earliest(due, now.Add(n.opt.Hold))
			n.hold(i, ep.ID, as[0])
		} else if t := time.UnixMilli(firedMS).Add(n.opt.Hold); firedMS != 0 && now.Before(t) {
			// Firing there since firedMS: resolve when the hold is over,
			// and until then resend it as firing (marked ended).
			due = earliest(due, t)
			n.hold(i, ep.ID, Late(as[0], t.Add(n.opt.Resend)))
			continue
		} else {
			n.hold(i, ep.ID, Alert{}) // its resolution goes now
		}
		alerts = append(alerts, as...)
		sent = append(sent, acc)
		if len(sent) >= passBatch {
			if err := flush(); err != nil {
				return due, err
			}
		}
	}
	if err := flush(); err != nil {
		return due, err
	}
	n.refreshQueue()
	return due, nil
}

func earliest(a, b time.Time) time.Time {
	if a.IsZero() || b.Before(a) {
		return b
	}
	return a
}

func delivered(e store.OutboxEntry, target string) bool {
	for _, d := range e.Delivered {
		if d == target {
			return true
		}
	}
	return false
}

// track keeps the resend set in step with what was last built.
func (n *Notifier) track(e *store.Episode, as []Alert) {
	n.mu.Lock()
	defer n.mu.Unlock()
	if e.Active {
		n.firing[e.ID] = as[:1]
	} else {
		delete(n.firing, e.ID)
	}
}

// hold sets (or, with a zero Alert, removes) what target i is resent of an
// ended episode until its resolution.
func (n *Notifier) hold(i int, episode uint64, a Alert) {
	n.mu.Lock()
	defer n.mu.Unlock()
	if a.Labels == nil {
		delete(n.held[i], episode)
	} else {
		n.held[i][episode] = a
	}
}

// resend posts every active alert again to target i (Alertmanager
// resolves a firing alert that is not repeated within its
// resolve_timeout), and the ended ones it holds firing.
func (n *Notifier) resend(ctx context.Context, i int) error {
	c := n.clients[i]
	n.mu.Lock()
	var alerts []Alert
	for _, as := range n.firing {
		alerts = append(alerts, as...)
	}
	for _, a := range n.held[i] {
		alerts = append(alerts, a)
	}
	n.mu.Unlock()
	if n.opt.Fleet {
		alerts = n.notMoved(alerts)
	}
	for len(alerts) > 0 {
		k := min(len(alerts), passBatch)
		if err := c.post(ctx, alerts[:k]); err != nil {
			return err
		}
		n.m.resent.WithLabelValues(c.base).Add(float64(k))
		alerts = alerts[k:]
	}
	return nil
}

// notMoved leaves out the alerts of devices that moved to another gateway
// of the fleet (their episodes go on there, and that gateway resends them
// under the same labels). They stay in the resend set: a device that comes
// back here has them resent again.
func (n *Notifier) notMoved(alerts []Alert) []Alert {
	moved := map[string]bool{}
	out := alerts[:0]
	for _, a := range alerts {
		id := a.Labels["device"]
		m, ok := moved[id]
		if !ok {
			d, err := n.opt.Store.Device(id)
			m = err == nil && d.MovedTo != ""
			moved[id] = m
		}
		if !m {
			out = append(out, a)
		}
	}
	return out
}

// refreshQueue reads the outbox for the gauges.
func (n *Notifier) refreshQueue() {
	if _, _, err := n.readQueue(); err != nil {
		n.opt.Logger.Warn("outbox unreadable", "err", err)
	}
}

// readQueue reads the outbox and sets the gauges from it, the read and the
// set under one lock: targets deliver and refresh concurrently, and a
// target that read the outbox before another removed an entry must not set
// the gauges after that other's later read (the gauge stayed at 1 with the
// outbox empty until the next pass).
func (n *Notifier) readQueue() ([]store.OutboxEntry, int, error) {
	n.qmu.Lock()
	defer n.qmu.Unlock()
	ents, total, err := n.opt.Store.Outbox(0)
	if err != nil {
		return nil, 0, err
	}
	n.setQueue(ents, total)
	return ents, total, nil
}

func (n *Notifier) setQueue(ents []store.OutboxEntry, total int) {
	oldest := int64(0)
	for _, e := range ents {
		if oldest == 0 || e.QueuedMS < oldest {
			oldest = e.QueuedMS
		}
	}
	n.m.queued.Set(float64(total))
	n.m.oldestMS.Store(oldest)
}
