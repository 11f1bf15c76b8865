package ingest

import (
	"context"
	"errors"
	"maps"
	"sync"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// opLabels are the operator's labels by device (AdminService.SetDeviceLabels;
// shared by a fleet on etcd). A device's description carries the labels of
// its introduction with the operator's added; an operator label wins over an
// introduction label of the same key.
type opLabels struct {
	mu sync.RWMutex
	m  map[string]map[string]string
}

// merged returns intro with the operator's labels of id added.
func (o *opLabels) merged(id string, intro map[string]string) map[string]string {
	o.mu.RLock()
	defer o.mu.RUnlock()
	op := o.m[id]
	if len(op) == 0 {
		return intro
	}
	out := make(map[string]string, len(intro)+len(op))
	maps.Copy(out, intro)
	maps.Copy(out, op)
	return out
}

// introduced recovers the introduction's labels from a stored description
// (at load): its labels without the operator's keys. An introduction label
// the operator's replaced comes back with the device's next introduction.
func (o *opLabels) introduced(id string, labels map[string]string) map[string]string {
	o.mu.RLock()
	defer o.mu.RUnlock()
	op := o.m[id]
	if len(op) == 0 {
		return labels
	}
	out := map[string]string{}
	for k, v := range labels {
		if _, ok := op[k]; !ok {
			out[k] = v
		}
	}
	return out
}

// SetLabels stores the operator's labels of a device (replacing earlier
// ones; empty removes them) with audit, and puts them in force: on the
// device's description now when this gateway knows the device, else from
// its first connection here. The caller has checked them (CheckLabels).
func (p *Pipeline) SetLabels(ctx context.Context, id string, labels map[string]string, audit *store.AuditEntry) error {
	if err := p.db.SetDeviceLabels(id, labels, audit); err != nil {
		return errorf(Unavailable, "store: %v", err)
	}
	p.labels.mu.Lock()
	if p.labels.m == nil {
		p.labels.m = map[string]map[string]string{}
	}
	if len(labels) == 0 {
		delete(p.labels.m, id)
	} else {
		p.labels.m[id] = maps.Clone(labels)
	}
	p.labels.mu.Unlock()
	d := p.devices.get(id)
	if d == nil {
		return nil
	}
	d.mu.Lock()
	d.desc.Labels = p.labels.merged(id, d.introLabels)
	desc := d.desc
	d.mu.Unlock()
	if err := p.w.sync(ctx, &record{dev: d, desc: &desc}); err != nil && !errors.Is(err, errWriterClosed) {
		return errorf(Unavailable, "store: %v", err)
	}
	return nil
}

// Labels returns the operator's labels of a device (nil when none).
func (p *Pipeline) Labels(id string) map[string]string {
	p.labels.mu.RLock()
	defer p.labels.mu.RUnlock()
	return maps.Clone(p.labels.m[id])
}

// CheckLabels checks operator labels against the introduction's bounds,
// naming field in the error.
func CheckLabels(field string, labels map[string]string) error {
	if len(labels) > maxLabels {
		return errorf(Invalid, "%s: %d labels, want at most %d", field, len(labels), maxLabels)
	}
	for k, v := range labels {
		if len(k) < 1 || len(k) > maxLabelKeyLen {
			return errorf(Invalid, "%s: key %q: length %d, want 1..%d", field, k, len(k), maxLabelKeyLen)
		}
		if len(v) > maxLabelValLen {
			return errorf(Invalid, "%s: value of %q: length %d, want 0..%d", field, k, len(v), maxLabelValLen)
		}
	}
	return nil
}
