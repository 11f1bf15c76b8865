package cluster

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"sync"
	"time"

	clientv3 "go.etcd.io/etcd/client/v3"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Exactly once across a kill: a gateway killed after committing a device's
// messages but before its acknowledgement reached the device holds messages
// that the device resends to its next gateway (it resends everything not
// acknowledged). When the killed gateway comes back it asks every other
// member, through etcd, which of its newest messages they hold (Ask), and
// drops its own copy of each one held elsewhere (HeldElsewhere;
// internal/gateway reconcileResent). Every member answers
// the questions of the others from its store (ServeHeld). The messages
// themselves never pass through etcd, and nothing on the data path waits
// for it: this runs once per restart, off the streams.
//
//	PREFIX/ask/ADDR          {"id":N,"devices":{"DEV":[lo,hi]}}  the asker's member lease
//	PREFIX/answer/ADDR/FROM  {"id":N,"held":{"DEV":[HeldRange]}}  the answerer's member lease

type askMsg struct {
	ID      int64                `json:"id"`
	Devices map[string][2]uint64 `json:"devices"`
}

type answerMsg struct {
	ID   int64                        `json:"id"`
	Held map[string][]store.HeldRange `json:"held"`
}

func (n *Node) askKey(addr string) string { return n.prefix + "ask/" + addr }
func (n *Node) answerPrefix(asker string) string {
	return n.prefix + "answer/" + asker + "/"
}

// ServeHeld makes this gateway answer the other members' questions (Ask)
// from held until ctx ends: which of a device's sequence numbers lo..hi its
// store holds (store.DB.LedgerHeld). Call it once, with the gateway's store.
func (n *Node) ServeHeld(ctx context.Context, held func(device string, lo, hi uint64) ([]store.HeldRange, error)) {
	for ctx.Err() == nil {
		r, err := n.c.Get(ctx, n.prefix+"ask/", clientv3.WithPrefix())
		if err == nil {
			for _, kv := range r.Kvs {
				n.answer(ctx, kv, held)
			}
			wch := n.c.Watch(clientv3.WithRequireLeader(ctx), n.prefix+"ask/", clientv3.WithPrefix(), clientv3.WithRev(r.Header.Revision+1))
			for wr := range wch {
				if wr.Err() != nil {
					break
				}
				for _, ev := range wr.Events {
					if ev.Type == clientv3.EventTypePut {
						n.answer(ctx, ev.Kv, held)
					}
				}
			}
		}
		select {
		case <-ctx.Done():
		case <-time.After(n.ttl / 3):
		}
	}
}

// answer puts this gateway's answer to one question.
func (n *Node) answer(ctx context.Context, kv interface {
	GetKey() []byte
	GetValue() []byte
}, held func(device string, lo, hi uint64) ([]store.HeldRange, error)) {
	asker := strings.TrimPrefix(string(kv.GetKey()), n.prefix+"ask/")
	if asker == n.self {
		return
	}
	var q askMsg
	if err := json.Unmarshal(kv.GetValue(), &q); err != nil {
		n.log.Warn("cluster: question from another gateway not understood", "from", asker, "err", err)
		return
	}
	a := answerMsg{ID: q.ID, Held: map[string][]store.HeldRange{}}
	for dev, r := range q.Devices {
		hr, err := held(dev, r[0], r[1])
		if err != nil {
			n.log.Warn("cluster: question from another gateway not answered", "from", asker, "device", dev, "err", err)
			return // no answer: the asker keeps its copies (at least once)
		}
		if len(hr) > 0 {
			a.Held[dev] = hr
		}
	}
	b, _ := json.Marshal(a)
	lease := clientv3.LeaseID(n.lease.Load())
	if lease == 0 {
		return
	}
	pctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	if _, err := n.c.Put(pctx, n.answerPrefix(asker)+n.self, string(b), clientv3.WithLease(lease)); err != nil {
		n.log.Warn("cluster: answer to another gateway not published", "to", asker, "err", err)
	}
}

// Ask asks every other live member which of the sequence numbers
// devices[DEV] = [lo, hi] it holds, and waits up to wait for all of them.
// It returns what each member that answered holds, by member address, and
// the members that did not answer in time (ask again later).
func (n *Node) Ask(ctx context.Context, devices map[string][2]uint64, wait time.Duration) (map[string]map[string][]store.HeldRange, []string, error) {
	lease := clientv3.LeaseID(n.lease.Load())
	if lease == 0 {
		return nil, nil, ErrNotRegistered
	}
	id := time.Now().UnixNano()
	b, _ := json.Marshal(askMsg{ID: id, Devices: devices})
	ctx, cancel := context.WithTimeout(ctx, wait)
	defer cancel()
	r, err := n.c.Put(ctx, n.askKey(n.self), string(b), clientv3.WithLease(lease))
	if err != nil {
		return nil, nil, fmt.Errorf("cluster: asking the other gateways: %w", err)
	}
	defer func() {
		dctx, dcancel := context.WithTimeout(context.Background(), n.ttl)
		defer dcancel()
		_, _ = n.c.Delete(dctx, n.askKey(n.self))
		_, _ = n.c.Delete(dctx, n.answerPrefix(n.self), clientv3.WithPrefix())
	}()
	got := map[string]map[string][]store.HeldRange{}
	var mu sync.Mutex
	take := func(key, val []byte) {
		from := strings.TrimPrefix(string(key), n.answerPrefix(n.self))
		var a answerMsg
		if json.Unmarshal(val, &a) != nil || a.ID != id {
			return
		}
		mu.Lock()
		got[from] = a.Held
		mu.Unlock()
	}
	missing := func() []string {
		var out []string
		for _, m := range n.Members() {
			if _, ok := got[m]; !ok && m != n.self {
				out = append(out, m)
			}
		}
		return out
	}
	wch := n.c.Watch(ctx, n.answerPrefix(n.self), clientv3.WithPrefix(), clientv3.WithRev(r.Header.Revision))
	tick := time.NewTicker(200 * time.Millisecond) // the member list may shrink meanwhile
	defer tick.Stop()
	for len(missing()) > 0 {
		select {
		case wr, ok := <-wch:
			if !ok || wr.Err() != nil {
				return got, missing(), nil
			}
			for _, ev := range wr.Events {
				if ev.Type == clientv3.EventTypePut {
					take(ev.Kv.Key, ev.Kv.Value)
				}
			}
		case <-tick.C:
		case <-ctx.Done():
			return got, missing(), nil
		}
	}
	return got, nil, nil
}

// NoteResent counts messages dropped because another member holds them,
// and whether this gateway's reconciliation after its start is complete.
func (n *Node) NoteResent(dropped uint64, done bool) {
	n.m.dropped.Add(float64(dropped))
	if done {
		n.m.reconciled.Set(1)
	}
}

// HeldElsewhere returns the parts of own (this gateway's record of a
// device's messages) that held (another gateway's records of the same
// device, from its store: durable there) also hold. The returning gateway
// drops its copy of those: the device resent them, so this gateway's
// acknowledgement never reached it, and the other copy stays. Arrival
// times do not matter: one copy is enough, whichever came first. Two
// gateways that both returned and reconcile at once must not drop the same
// message on both sides: a gateway leaves out of its answers the messages
// of its own pending question (Exclude), so both keep theirs then (at least
// once rather than lost).
func HeldElsewhere(own store.HeldRange, held []store.HeldRange) [][2]uint64 {
	var out [][2]uint64
	for _, h := range held {
		lo, hi := max(h.First, own.First), min(h.Last, own.Last)
		if lo <= hi {
			out = append(out, [2]uint64{lo, hi})
		}
	}
	return out
}

// Exclude returns held without the sequence numbers lo..hi (an answer that
// leaves out what the answering gateway may drop itself).
func Exclude(held []store.HeldRange, lo, hi uint64) []store.HeldRange {
	var out []store.HeldRange
	for _, h := range held {
		if h.Last < lo || h.First > hi {
			out = append(out, h)
			continue
		}
		if h.First < lo {
			l := h
			l.Last = lo - 1
			out = append(out, l)
		}
		if h.Last > hi {
			r := h
			r.First = hi + 1
			out = append(out, r)
		}
	}
	return out
}
