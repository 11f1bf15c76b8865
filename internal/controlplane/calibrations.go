package controlplane

import (
	"context"
	"encoding/json"
	"fmt"
	"strconv"

	clientv3 "go.etcd.io/etcd/client/v3"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Assignment is a shared calibration assignment: Target is "model:NAME" or
// "device:ID", Ref the calibration it gets ("name@vN", "empirical",
// "beer-lambert"); an empty Ref removes the assignment.
type Assignment struct {
	Target string `json:"target"`
	Ref    string `json:"ref"`
	Device string `json:"device,omitempty"` // the device of a "device:" target (audit)
	Actor  string `json:"actor"`
}

type calibrationEntry struct {
	Gateway     string            `json:"gateway"`
	Calibration store.Calibration `json:"calibration"`
}

type assignmentEntry struct {
	Gateway    string     `json:"gateway"`
	Assignment Assignment `json:"assignment"`
}

// versionKey orders a calibration's versions as etcd orders keys.
func versionKey(v uint32) string { return fmt.Sprintf("%010d", v) }

// PublishCalibration writes a new version of a calibration curve for the
// whole fleet and returns it with its version. The version is the fleet's:
// one above the highest published for the name and at least atLeast (the
// next version of this gateway's own store, so a version held only here
// from before the fleet is never reused); two gateways publishing the same
// name at once get different versions (a create-only transaction, tried
// again on a clash). It fails with ErrUnreachable while etcd does not
// answer; then the caller must not store the curve either.
func (p *Plane) PublishCalibration(ctx context.Context, c store.Calibration, atLeast uint32) (store.Calibration, error) {
	if !p.up.Load() {
		return c, ErrUnreachable
	}
	ctx, cancel := context.WithTimeout(ctx, p.cfg.Timeout)
	defer cancel()
	dir := p.key("calibrations", c.Name) + "/"
	for try := 0; try < 8; try++ {
		resp, err := p.cfg.Client.Get(ctx, dir, clientv3.WithPrefix(), clientv3.WithSort(clientv3.SortByKey, clientv3.SortDescend), clientv3.WithLimit(1), clientv3.WithKeysOnly())
		if err != nil {
			p.setUp(false, err)
			return c, fmt.Errorf("%w (%v)", ErrUnreachable, err)
		}
		c.Version = max(atLeast, 1)
		if len(resp.Kvs) == 1 {
			last, err := strconv.ParseUint(string(resp.Kvs[0].Key[len(dir):]), 10, 32)
			if err != nil {
				return c, fmt.Errorf("controlplane: calibration key %q: %w", resp.Kvs[0].Key, err)
			}
			c.Version = max(c.Version, uint32(last)+1)
		}
		v, err := json.Marshal(calibrationEntry{Gateway: p.cfg.Self, Calibration: c})
		if err != nil {
			return c, err
		}
		key := dir + versionKey(c.Version)
		tr, err := p.cfg.Client.Txn(ctx).If(clientv3.Compare(clientv3.CreateRevision(key), "=", 0)).Then(clientv3.OpPut(key, string(v))).Commit()
		if err != nil {
			p.setUp(false, err)
			return c, fmt.Errorf("%w (%v)", ErrUnreachable, err)
		}
		if tr.Succeeded {
			return c, nil
		}
	}
	return c, fmt.Errorf("controlplane: calibration %s: another gateway kept taking the next version; try again", c.Name)
}

// PublishAssignment writes a calibration assignment (or its removal) for
// the whole fleet, failing like PublishToken.
func (p *Plane) PublishAssignment(ctx context.Context, a Assignment) error {
	return p.publish(ctx, p.key("calassign", a.Target), assignmentEntry{Gateway: p.cfg.Self, Assignment: a})
}

// Labels are a device's operator labels, shared by the fleet (an empty
// Labels removes them).
type Labels struct {
	Device string            `json:"device"`
	Labels map[string]string `json:"labels"`
	Actor  string            `json:"actor"`
	Reason string            `json:"reason"`
}

type labelsEntry struct {
	Gateway string `json:"gateway"`
	Labels  Labels `json:"labels"`
}

// PublishLabels writes a device's operator labels for the whole fleet,
// failing like PublishToken.
func (p *Plane) PublishLabels(ctx context.Context, l Labels) error {
	return p.publish(ctx, p.key("labels", l.Device), labelsEntry{Gateway: p.cfg.Self, Labels: l})
}
