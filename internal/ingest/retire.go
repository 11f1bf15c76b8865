package ingest

import (
	"context"
	"fmt"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// Retire ends a retired device's alarm state on this gateway (a fleet on
// etcd: internal/gateway RetireDevice, after the shared state is gone from
// etcd). Each open episode that was announced is stored as ended now (and
// notified so: the operator retired the device, audited by the caller);
// the engine keeps its episode numbering (no stored episode is ever
// overwritten) and stays offline with no condition present, so nothing is
// raised for the device again until it streams, which it may do later as
// after any disconnection. It refuses a device streaming here. It returns
// whether the device was known here and how many episodes it ended.
func (p *Pipeline) Retire(ctx context.Context, id string) (known bool, ended int, err error) {
	d := p.devices.get(id)
	if d == nil {
		return false, 0, nil
	}
	nowMS := p.nowMS()
	d.mu.Lock()
	if d.stream != nil {
		d.mu.Unlock()
		return true, 0, errorf(Precondition, "device %s is streaming to this gateway: not retired (stop the device first)", id)
	}
	rec := &record{dev: d}
	if d.engine != nil {
		st := d.engine.Snapshot()
		t := d.techNowS(nowMS)
		for i := range st.Conditions {
			c := &st.Conditions[i]
			for _, ep := range []*alarms.Episode{c.Episode, c.Latched} {
				if ep == nil || !ep.Announced() {
					continue // a pending onset was never announced: nothing to end
				}
				e := *ep
				e.Phase = alarms.Inactive
				if !(e.EndedS > 0) {
					e.EndedS = t
				}
				rec.episodes = append(rec.episodes, p.storeEpisode(d, &e))
				ended++
			}
			c.Episode, c.Latched = nil, nil
		}
		st.Offline, st.Pause = true, nil
		e, rerr := alarms.Restore(d.profile, st)
		if rerr != nil {
			d.mu.Unlock()
			return true, 0, fmt.Errorf("retiring device %s: its alarm state: %w", id, rerr)
		}
		d.engine = e
		d.alarmRev = 0
		rec.alarm = d.alarmSnapshot() // stored here, not published to the fleet
	}
	d.desc.MovedTo, d.desc.MovedMS = "", 0
	desc := d.desc
	rec.desc = &desc
	p.refreshActive(d)
	d.mu.Unlock()
	if err := p.w.submit(context.WithoutCancel(ctx), rec); err != nil {
		return true, 0, fmt.Errorf("retiring device %s: %w", id, err)
	}
	p.publishDevice(d, "retired")
	return true, ended, nil
}

// StreamingHere reports whether device id has an open stream here.
func (p *Pipeline) StreamingHere(id string) bool {
	d := p.devices.get(id)
	return d != nil && d.streamNow() != nil
}

// HoldsAlarms reports whether device id, not streaming here, has an alarm
// engine that is not in its retired state (online, or with an episode open
// or pending): what Retire would change.
func (p *Pipeline) HoldsAlarms(id string) bool {
	d := p.devices.get(id)
	if d == nil {
		return false
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	if d.stream != nil || d.engine == nil {
		return false
	}
	if !d.engine.Offline() {
		return true
	}
	for _, e := range d.engine.Episodes(nil) {
		if e.Phase != alarms.Inactive {
			return true
		}
	}
	return false
}
