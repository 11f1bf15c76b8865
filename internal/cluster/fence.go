package cluster

import (
	"context"
	"errors"
	"fmt"
	"time"

	clientv3 "go.etcd.io/etcd/client/v3"
)

// ErrLeaseLost ends the streams of a gateway whose member lease expired in
// etcd while it was cut off: other members may have taken its devices.
var ErrLeaseLost = errors.New("cluster: this gateway's member lease expired in etcd; its devices may be served elsewhere")

// ErrNotRegistered is Acquire's answer while this gateway has no member
// lease (etcd unreachable since its lease expired).
var ErrNotRegistered = errors.New("cluster: this gateway is not registered in etcd (unreachable?); try another gateway")

// MovedError says a device is owned by another member.
type MovedError struct{ Device, Owner string }

func (e *MovedError) Error() string {
	return fmt.Sprintf("device %s belongs to the gateway at %s", e.Device, e.Owner)
}

// HeldError says another gateway still holds a device's fence after the
// wait: its stream there has not ended yet (or that gateway died and its
// lease has not expired yet).
type HeldError struct {
	Device, Holder string
	Waited         time.Duration
}

func (e *HeldError) Error() string {
	return fmt.Sprintf("device %s is still streaming to the gateway at %s (waited %v); retry", e.Device, e.Holder, e.Waited.Round(time.Millisecond))
}

// hold is one fence this gateway holds.
type hold struct {
	n      *Node
	device string
	rev    int64 // mod revision of our put: release deletes only that version
	lost   func(error)
}

func (h *hold) lose(err error) {
	if h.lost != nil {
		h.lost(err)
	}
}

func (n *Node) fenceKey(deviceID string) string { return n.prefix + "fence/" + deviceID }

// Acquire takes the fence of deviceID for a stream this gateway is about to
// accept. The fence is the key PREFIX/fence/DEVICE, created only when absent
// (a transaction on its create revision) and attached to this gateway's
// member lease, so it disappears with the lease when the gateway dies.
// When another gateway holds it, Acquire watches the key and takes it as
// soon as it is deleted, for at most Config.AcquireWait. lost is called (from
// another goroutine, at most once) when the fence is taken away: the device
// moved to another member, or this gateway's lease expired; the caller ends
// the stream then. release gives the fence back; call it when the stream
// ended.
func (n *Node) Acquire(ctx context.Context, deviceID string, lost func(error)) (release func(), err error) {
	start := time.Now()
	ctx, cancel := context.WithTimeout(ctx, n.wait)
	defer cancel()
	key := n.fenceKey(deviceID)
	holder, counted := "", false
	for {
		lease := clientv3.LeaseID(n.lease.Load())
		if lease == 0 {
			return nil, ErrNotRegistered
		}
		if o := n.Owner(deviceID); o != "" {
			return nil, &MovedError{Device: deviceID, Owner: o}
		}
		resp, err := n.c.Txn(ctx).If(clientv3.Compare(clientv3.CreateRevision(key), "=", 0)).
			Then(clientv3.OpPut(key, n.self, clientv3.WithLease(lease)), clientv3.OpDelete(n.retiredKey(deviceID))).
			Else(clientv3.OpGet(key)).Commit()
		if err != nil {
			if holder != "" && ctx.Err() != nil {
				return nil, &HeldError{Device: deviceID, Holder: holder, Waited: time.Since(start)}
			}
			return nil, fmt.Errorf("cluster: fence of device %s in etcd: %w", deviceID, err)
		}
		if resp.Succeeded {
			return n.keep(deviceID, resp.Header.Revision, lost), nil
		}
		kvs := resp.Responses[0].GetResponseRange().Kvs
		if len(kvs) == 0 {
			continue // deleted in between
		}
		kv := kvs[0]
		if string(kv.Value) == n.self && clientv3.LeaseID(kv.Lease) == lease {
			// Ours already: an earlier stream of this device on this
			// gateway has not released yet. Take it over with a new
			// version, so that stream's release deletes nothing.
			r, err := n.c.Txn(ctx).If(clientv3.Compare(clientv3.ModRevision(key), "=", kv.ModRevision)).
				Then(clientv3.OpPut(key, n.self, clientv3.WithLease(lease))).Commit()
			if err != nil {
				return nil, fmt.Errorf("cluster: fence of device %s in etcd: %w", deviceID, err)
			}
			if r.Succeeded {
				return n.keep(deviceID, r.Header.Revision, lost), nil
			}
			continue
		}
		holder = string(kv.Value)
		if !counted {
			n.m.waits.Inc()
			counted = true
		}
		if !n.waitDeleted(ctx, key, resp.Header.Revision+1) {
			return nil, &HeldError{Device: deviceID, Holder: holder, Waited: time.Since(start)}
		}
	}
}

// waitDeleted waits for key to be deleted after revision rev.
func (n *Node) waitDeleted(ctx context.Context, key string, rev int64) bool {
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	for wr := range n.c.Watch(wctx, key, clientv3.WithRev(rev)) {
		if wr.Err() != nil {
			return false
		}
		for _, ev := range wr.Events {
			if ev.Type == clientv3.EventTypeDelete {
				return true
			}
		}
	}
	return false
}

// keep records a fence and returns its release.
func (n *Node) keep(deviceID string, rev int64, lost func(error)) func() {
	h := &hold{n: n, device: deviceID, rev: rev, lost: lost}
	n.alarmMu.Lock()
	delete(n.retired, deviceID) // streams again: its alarm state is shared again
	n.alarmMu.Unlock()
	n.mu.Lock()
	prev := n.held[deviceID]
	n.held[deviceID] = h
	n.m.fences.Set(float64(len(n.held)))
	n.mu.Unlock()
	if prev != nil {
		prev.lose(errors.New("cluster: a newer stream of the device took its fence"))
	}
	return func() { n.release(h) }
}

// release deletes the fence in etcd if it is still this hold's version.
func (n *Node) release(h *hold) {
	n.mu.Lock()
	if n.held[h.device] == h {
		delete(n.held, h.device)
	}
	n.m.fences.Set(float64(len(n.held)))
	n.mu.Unlock()
	ctx, cancel := context.WithTimeout(context.Background(), n.ttl)
	defer cancel()
	key := n.fenceKey(h.device)
	_, err := n.c.Txn(ctx).If(clientv3.Compare(clientv3.ModRevision(key), "=", h.rev)).
		Then(clientv3.OpDelete(key)).Commit()
	if err != nil {
		// The key stays until this gateway's lease ends; a stream of the
		// device here takes it over, one elsewhere waits for the lease.
		n.log.Warn("cluster: fence not released", "device", h.device, "err", err)
	}
}

// loseAll drops every fence (the lease is gone) and tells their streams.
func (n *Node) loseAll(err error) {
	n.mu.Lock()
	held := n.held
	n.held = map[string]*hold{}
	n.m.fences.Set(0)
	n.mu.Unlock()
	for _, h := range held {
		h.lose(err)
	}
}

// Held is the number of fences this gateway holds.
func (n *Node) Held() int {
	n.mu.Lock()
	defer n.mu.Unlock()
	return len(n.held)
}

// RedirectTo is the owner's address (the gateway redirects the device there).
func (e *MovedError) RedirectTo() string { return e.Owner }
