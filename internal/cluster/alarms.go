package cluster

import (
	"context"
	"fmt"
	"strings"
	"time"

	clientv3 "go.etcd.io/etcd/client/v3"
)

// Alarm state travels with a device between the gateways of a fleet: the
// gateway that streams a device publishes its alarm engine's snapshot
// (alarms.State as JSON) to PREFIX/alarm/DEVICE after every alarm
// transition (onset, announcement, escalation, end, acknowledgement,
// pause: a few per device per hour, not per sample), and the gateway that
// takes the device over reads it when it takes the fence, so an episode
// the previous gateway announced continues there instead of being
// announced again. Publishing never blocks the stream: the newest snapshot
// per device waits for one publisher goroutine, which retries every second
// while etcd does not answer. What a gateway killed between a transition
// and its publication had not published is lost (the new gateway then
// starts from what its own store holds): the window is one etcd round trip.

func (n *Node) alarmKey(deviceID string) string { return n.prefix + "alarm/" + deviceID }

// PublishAlarm queues a device's newest alarm snapshot for etcd.
func (n *Node) PublishAlarm(deviceID string, state []byte) {
	n.alarmMu.Lock()
	if !n.retired[deviceID] {
		n.alarmPending[deviceID] = state
	}
	n.alarmMu.Unlock()
	select {
	case n.alarmKick <- struct{}{}:
	default:
	}
}

// SharedAlarm returns the last alarm snapshot published for a device by
// any gateway (nil when none).
func (n *Node) SharedAlarm(ctx context.Context, deviceID string) ([]byte, error) {
	n.alarmMu.Lock()
	if b, ok := n.alarmPending[deviceID]; ok { // ours, not yet out
		n.alarmMu.Unlock()
		return b, nil
	}
	n.alarmMu.Unlock()
	ctx, cancel := context.WithTimeout(ctx, n.ttl/3)
	defer cancel()
	r, err := n.c.Get(ctx, n.alarmKey(deviceID))
	if err != nil {
		return nil, fmt.Errorf("cluster: shared alarm state of %s: %w", deviceID, err)
	}
	if len(r.Kvs) == 0 {
		return nil, nil
	}
	return r.Kvs[0].Value, nil
}

// publishAlarms writes queued snapshots until ctx ends.
func (n *Node) publishAlarms(ctx context.Context) {
	t := time.NewTicker(time.Second)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-n.alarmKick:
		case <-t.C:
		}
		n.alarmMu.Lock()
		batch := n.alarmPending
		n.alarmPending = map[string][]byte{}
		n.alarmMu.Unlock()
		for id, b := range batch {
			pctx, cancel := context.WithTimeout(ctx, n.ttl/3)
			// Not for a retired device (retire.go): a gateway that still
			// evaluates what its store held of it must not bring it back.
			_, err := n.c.Txn(pctx).If(clientv3.Compare(clientv3.CreateRevision(n.retiredKey(id)), "=", 0)).
				Then(clientv3.OpPut(n.alarmKey(id), string(b))).Commit()
			cancel()
			if err != nil {
				n.alarmMu.Lock()
				if _, newer := n.alarmPending[id]; !newer {
					n.alarmPending[id] = b // retried on the next tick
				}
				n.alarmMu.Unlock()
			}
		}
	}
}

// MembersChanged receives a value after the member list changed (at most
// one waits; the first list at Join counts as a change).
func (n *Node) MembersChanged() <-chan struct{} { return n.changed }

// SilentDevices returns the shared alarm snapshots of the devices this
// gateway owns that stream to no gateway (no fence in etcd): a device whose
// gateway died and that did not reconnect anywhere. The owner adopts them
// (ingest.Pipeline.AdoptSilent), so nobody else announces them offline and
// they are not left without any.
func (n *Node) SilentDevices(ctx context.Context) (map[string][]byte, error) {
	ctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	ar, err := n.c.Get(ctx, n.prefix+"alarm/", clientv3.WithPrefix())
	if err != nil {
		return nil, fmt.Errorf("cluster: shared alarm states: %w", err)
	}
	fr, err := n.c.Get(ctx, n.prefix+"fence/", clientv3.WithPrefix(), clientv3.WithKeysOnly(), clientv3.WithRev(ar.Header.Revision))
	if err != nil {
		return nil, fmt.Errorf("cluster: fences: %w", err)
	}
	fenced := make(map[string]bool, len(fr.Kvs))
	for _, kv := range fr.Kvs {
		fenced[strings.TrimPrefix(string(kv.Key), n.prefix+"fence/")] = true
	}
	out := map[string][]byte{}
	for _, kv := range ar.Kvs {
		id := strings.TrimPrefix(string(kv.Key), n.prefix+"alarm/")
		if !fenced[id] && n.Owner(id) == "" && n.ring.Load() != nil {
			out[id] = kv.Value
		}
	}
	return out, nil
}
