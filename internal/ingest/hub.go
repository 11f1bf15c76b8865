package ingest

import (
	"sync"
	"sync/atomic"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// hub fans live events out to watchers. Publishing never blocks: a watcher
// whose buffer is full loses the event (counted) rather than slowing ingest.
type hub struct {
	mu   sync.RWMutex
	subs map[*subscription]struct{}
	m    *metrics
}

type subscription struct {
	ch      chan *pb.WatchEventsResponse
	devices map[string]bool // nil = all
	points  bool            // wants every trend point
	dropped atomic.Uint64   // added to under the hub's read lock, so atomic
}

func newHub(m *metrics) *hub { return &hub{subs: map[*subscription]struct{}{}, m: m} }

// subscribe registers a watcher; the caller must call unsubscribe.
func (h *hub) subscribe(devices []string, points bool, buf int) *subscription {
	s := &subscription{ch: make(chan *pb.WatchEventsResponse, buf), points: points}
	if len(devices) > 0 {
		s.devices = map[string]bool{}
		for _, d := range devices {
			s.devices[d] = true
		}
	}
	h.mu.Lock()
	h.subs[s] = struct{}{}
	h.mu.Unlock()
	h.m.watchers.Inc()
	return s
}

func (h *hub) unsubscribe(s *subscription) {
	h.mu.Lock()
	if _, ok := h.subs[s]; ok {
		delete(h.subs, s)
		h.m.watchers.Dec()
	}
	h.mu.Unlock()
}

// publish offers ev (about device) to every interested watcher.
func (h *hub) publish(device string, ev *pb.WatchEventsResponse) {
	_, isPoint := ev.Event.(*pb.WatchEventsResponse_TrendPoint)
	h.mu.RLock()
	defer h.mu.RUnlock()
	for s := range h.subs {
		if s.devices != nil && !s.devices[device] {
			continue
		}
		if isPoint && !s.points {
			continue
		}
		select {
		case s.ch <- ev:
		default:
			s.dropped.Add(1)
			h.m.watchDropped.Inc()
		}
	}
}

// hasWatchers reports whether anyone listens (to skip building events).
func (h *hub) hasWatchers() bool {
	h.mu.RLock()
	defer h.mu.RUnlock()
	return len(h.subs) > 0
}
