package ingest

import (
	"encoding/json"
	"sort"
	"sync"
	"sync/atomic"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// device is the gateway's live view of one device. It outlives streams: a
// device that reconnects finds its cursor, alarm engine and quality figures.
type device struct {
	id string

	mu         sync.Mutex
	desc       store.Device // description, persisted when it changes
	cur        store.Cursor // accepted position and counters (ahead of durable)
	durableSeq uint64       // highest sequence number known durable
	// epoch counts the batches with this device's data that failed to
	// commit. A data record carries the epoch it was accepted in; the writer
	// writes and acknowledges it only while the device is still in that
	// epoch (writer.go). Written under mu by the writer; read without it.
	epoch       atomic.Uint64
	stream      *stream        // the open stream, nil when disconnected
	latest      *pb.TrendPoint // last trend point
	engine      *alarms.Engine // nil when no profile applies
	profile     *alarms.Profile
	ownProfile  bool                  // the profile was set for this device
	introLabels map[string]string     // the labels of its last introduction (desc.Labels adds the operator's: labels.go)
	alarmRev    uint64                // engine revision last persisted
	adopted     bool                  // the engine was adopted from the fleet; its open episodes are not stored here yet (fence.go)
	sessionMS   int64                 // start of the current or last session (gateway clock)
	q           quality               // signal-quality and uptime accumulators
	clock       deviceClock           // device time policy (clock.go)
	activeGauge map[[2]string]float64 // this device's share of pulsefleet_alarms_active
	// Room-air anchor of a calibration on the anchored ratio (anchor.go):
	// the anchor, the calibration it belongs to, when the device's last
	// stream ended (gateway ms) and why SpO2 is withheld ("" = no reason
	// beyond the flags).
	anchor       *estimator.Anchor
	anchorRef    string
	anchorLeftMS int64
	spo2Note     string
}

// streamNow returns the device's open stream (nil when none).
func (d *device) streamNow() *stream {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.stream
}

func (d *device) markDurable(seq uint64) {
	d.mu.Lock()
	if seq > d.durableSeq {
		d.durableSeq = seq
	}
	// The device time of the newest durable message (clock.go).
	n := 0
	for n < len(d.clock.pending) && d.clock.pending[n].seq <= seq {
		d.clock.durableMS = d.clock.pending[n].devMS
		n++
	}
	if n > 0 {
		d.clock.pending = append(d.clock.pending[:0], d.clock.pending[n:]...)
	}
	d.mu.Unlock()
}

// deviceTimeS estimates the device clock (seconds) at gateway time nowMS,
// from the least-delayed recent message (so a resent backlog does not pull
// it back). Caller holds d.mu.
func (d *device) deviceTimeS(nowMS int64) float64 {
	if off, ok := d.q.clock.refOffset(); ok {
		return float64(nowMS+off) / 1000
	}
	return float64(nowMS) / 1000
}

// alarmSnapshot returns the engine's state to persist when it changed since
// the last call, else nil. Caller holds d.mu.
func (d *device) alarmSnapshot() []byte {
	if d.engine == nil || d.engine.Revision() == d.alarmRev {
		return nil
	}
	b, err := json.Marshal(d.engine.Snapshot())
	if err != nil {
		return nil
	}
	d.alarmRev = d.engine.Revision()
	return b
}

// toProto describes the device for FleetService. Caller holds d.mu.
func (d *device) toProto() *pb.Device {
	out := &pb.Device{
		DeviceId:           d.id,
		Model:              d.desc.Model,
		Firmware:           d.desc.Firmware,
		Labels:             d.desc.Labels,
		Connected:          d.stream != nil,
		LastSeenUnixMs:     d.cur.LastSeenMS,
		SessionStartUnixMs: d.sessionMS,
		Latest:             d.latest,
		Calibration:        d.desc.Calibration,
		BatteryPct:         d.desc.BatteryPct,
		LastSequence:       d.durableSeq,
		Spo2Note:           d.spo2Note,
		MovedToGateway:     d.desc.MovedTo,
		MovedUnixMs:        d.desc.MovedMS,
	}
	switch d.desc.Mode {
	case "raw":
		out.Mode = pb.Mode_MODE_RAW
	case "summary":
		out.Mode = pb.Mode_MODE_SUMMARY
	}
	if d.profile != nil {
		out.Profile = d.profile.Name
	}
	if d.engine != nil && d.desc.MovedTo == "" { // moved: its alarms are evaluated where it streams
		out.AlarmPriority = priorityProto(d.engine.Priority())
		var eps []alarms.Episode
		for _, e := range d.engine.Episodes(eps) {
			if e.Phase == alarms.Active || e.Phase == alarms.Latched {
				out.ActiveConditions = append(out.ActiveConditions, e.Condition)
			}
		}
		if _, until, ok := d.engine.Paused(d.engine.LastT()); ok {
			out.AlarmsPausedUntilUnixMs = int64(until * 1000)
		}
	}
	return out
}

// registry holds every known device.
type registry struct {
	mu sync.RWMutex
	m  map[string]*device
}

func (r *registry) get(id string) *device {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return r.m[id]
}

// getOrCreate returns the device, creating an empty one.
func (r *registry) getOrCreate(id string) (*device, bool) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if d, ok := r.m[id]; ok {
		return d, false
	}
	d := &device{id: id}
	d.desc.ID = id
	d.desc.BatteryPct = -1
	d.cur.Device = id
	r.m[id] = d
	return d, true
}

// all returns the devices sorted by id (a copy of the list; no I/O under the lock).
func (r *registry) all() []*device {
	r.mu.RLock()
	out := make([]*device, 0, len(r.m))
	for _, d := range r.m {
		out = append(out, d)
	}
	r.mu.RUnlock()
	sort.Slice(out, func(i, j int) bool { return out[i].id < out[j].id })
	return out
}
