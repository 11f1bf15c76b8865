package gateway

import (
	"context"
	"fmt"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/cluster"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// resentAsker is the part of the cluster that finds which of this
// gateway's messages other gateways hold (package cluster, resent.go).
type resentAsker interface {
	ServeHeld(ctx context.Context, held func(device string, lo, hi uint64) ([]store.HeldRange, error))
	Ask(ctx context.Context, devices map[string][2]uint64, wait time.Duration) (map[string]map[string][]store.HeldRange, []string, error)
	NoteResent(dropped uint64, done bool)
}

// resentWindowMS: the devices whose newest ledger record arrived within
// this long of the newest arrival in the store are checked after a start.
// A kill leaves the devices that were streaming at that moment; a device
// that stopped long before had every acknowledgement delivered.
const resentWindowMS = 60_000

// planResent lists, before any stream is accepted, each device's newest
// ledger record that may hold messages the device resent elsewhere: those
// that were streaming when this gateway last stopped (a kill leaves them;
// after a clean stop the others hold nothing of them and nothing is
// dropped).
func (g *Gateway) planResent() error {
	if _, ok := g.opt.Cluster.(resentAsker); !ok {
		return nil
	}
	newest, err := g.db.LedgerNewest()
	if err != nil {
		return err
	}
	var last int64
	for _, h := range newest {
		last = max(last, h.LastArrMS)
	}
	g.resentPlan = map[string]store.HeldRange{}
	for id, h := range newest {
		if h.LastArrMS >= last-resentWindowMS {
			g.resentPlan[id] = h
		}
	}
	return nil
}

// answerHeld answers the other gateways' questions until ctx ends. While
// this gateway's own question is pending, its answers leave out the
// messages it may drop itself (cluster.Exclude), so two gateways that
// returned together never both drop a message. Owned by Serve.
func (g *Gateway) answerHeld(ctx context.Context) {
	ra, ok := g.opt.Cluster.(resentAsker)
	if !ok {
		return
	}
	ra.ServeHeld(ctx, func(device string, lo, hi uint64) ([]store.HeldRange, error) {
		hrs, err := g.db.LedgerHeld(device, lo, hi)
		if err != nil || g.resentDone.Load() {
			return hrs, err
		}
		if own, ok := g.resentPlan[device]; ok {
			hrs = cluster.Exclude(hrs, own.First, own.Last)
		}
		return hrs, nil
	})
}

// reconcileResent drops this gateway's copy of messages that another
// gateway holds (durably, in its store): the device resent them there
// because this gateway's acknowledgement never reached it (it was killed
// after committing them). Each message is
// then held once across the fleet. It asks until every live member has
// answered. Owned by Serve.
func (g *Gateway) reconcileResent(ctx context.Context) {
	ra, ok := g.opt.Cluster.(resentAsker)
	if !ok {
		return
	}
	if len(g.resentPlan) == 0 {
		g.resentDone.Store(true)
		ra.NoteResent(0, true)
		return
	}
	ask := make(map[string][2]uint64, len(g.resentPlan))
	for id, h := range g.resentPlan {
		ask[id] = [2]uint64{h.First, h.Last}
	}
	var total uint64
	for ctx.Err() == nil {
		got, missing, err := ra.Ask(ctx, ask, 10*time.Second)
		if err != nil {
			g.log.Warn("messages held by other gateways not asked for; trying again", "err", err)
		}
		for from, held := range got {
			for id, hrs := range held {
				total += g.dropResent(ctx, from, id, hrs)
			}
		}
		if err == nil && len(missing) == 0 {
			g.resentDone.Store(true) // after the drops: answers may include the plan now
			ra.NoteResent(0, true)
			g.log.Info("checked with every other gateway which of this gateway's newest messages they hold",
				"devices", len(ask), "dropped_held_elsewhere", total)
			return
		}
		if len(missing) > 0 {
			g.log.Warn("gateways have not answered which messages they hold; asking again", "missing", missing)
		}
		select {
		case <-ctx.Done():
		case <-time.After(2 * time.Second):
		}
	}
}

// dropResent drops the part of device id's planned record that gateway from
// holds; it returns how many it dropped.
func (g *Gateway) dropResent(ctx context.Context, from, id string, hrs []store.HeldRange) uint64 {
	own, ok := g.resentPlan[id]
	if !ok {
		return 0
	}
	var total uint64
	for _, r := range cluster.HeldElsewhere(own, hrs) {
		lo, hi := r[0], r[1]
		n, err := g.db.DropMessages(id, lo, hi)
		if err != nil {
			g.log.Error("message held by another gateway not dropped here", "device", id, "from", lo, "to", hi, "err", err)
			continue
		}
		if n == 0 {
			continue
		}
		total += n
		g.opt.Cluster.(resentAsker).NoteResent(n, false)
		g.audit(ctx, "gateway", "fleet.resent_dropped", id,
			fmt.Sprintf("messages %d..%d (%d) dropped here: gateway %s holds them (the device resent them there; this gateway's acknowledgement never reached it)", lo, hi, n, from), "")
	}
	return total
}
