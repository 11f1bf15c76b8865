package cluster

import (
	"context"
	"fmt"
	"strings"

	clientv3 "go.etcd.io/etcd/client/v3"
)

// StreamingError refuses to retire a device that streams to a gateway of
// the fleet (its fence is held).
type StreamingError struct{ Device, Holder string }

func (e *StreamingError) Error() string {
	return fmt.Sprintf("device %s is streaming to the gateway at %s: not retired (stop the device first)", e.Device, e.Holder)
}

// Retire retires a device from the fleet: it deletes the device's shared
// alarm state (PREFIX/alarm/DEVICE), so no gateway adopts it when it is
// silent (SilentDevices), in one transaction that succeeds only when no
// gateway holds its fence (PREFIX/fence/DEVICE: a device streaming
// somewhere is refused with a *StreamingError; the fence itself is never
// deleted: it goes with its stream). A snapshot of the device this gateway
// has not yet published is dropped. A device that streams again later is
// a member of the fleet again, as any new device.
func (n *Node) Retire(ctx context.Context, deviceID string) error {
	n.alarmMu.Lock()
	delete(n.alarmPending, deviceID)
	n.retired[deviceID] = true // publishAlarms skips it until its next fence
	n.alarmMu.Unlock()
	ctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	fk := n.fenceKey(deviceID)
	resp, err := n.c.Txn(ctx).If(clientv3.Compare(clientv3.CreateRevision(fk), "=", 0)).
		Then(clientv3.OpDelete(n.alarmKey(deviceID)), clientv3.OpPut(n.retiredKey(deviceID), n.self)).
		Else(clientv3.OpGet(fk)).Commit()
	if err != nil {
		return fmt.Errorf("cluster: retiring device %s: etcd unreachable? %w; nothing was changed in etcd", deviceID, err)
	}
	if !resp.Succeeded {
		holder := "another gateway"
		if kvs := resp.Responses[0].GetResponseRange().Kvs; len(kvs) > 0 {
			holder = string(kvs[0].Value)
		}
		n.alarmMu.Lock()
		delete(n.retired, deviceID)
		n.alarmMu.Unlock()
		return &StreamingError{Device: deviceID, Holder: holder}
	}
	return nil
}

// Streaming reports the gateway whose fence of the device is held ("" when
// none): a check before retiring it locally.
func (n *Node) Streaming(ctx context.Context, deviceID string) (string, error) {
	ctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	r, err := n.c.Get(ctx, n.fenceKey(deviceID))
	if err != nil {
		return "", fmt.Errorf("cluster: fence of device %s: etcd unreachable? %w", deviceID, err)
	}
	if len(r.Kvs) == 0 {
		return "", nil
	}
	return string(r.Kvs[0].Value), nil
}

func (n *Node) retiredKey(deviceID string) string { return n.prefix + "retired/" + deviceID }

// RetiredDevices lists the devices retired from the fleet that have not
// streamed since (PREFIX/retired/DEVICE, value the gateway that took it):
// a gateway that was down at the retirement ends what its own store still
// holds of them (internal/gateway silentScan).
func (n *Node) RetiredDevices(ctx context.Context) (map[string]string, error) {
	ctx, cancel := context.WithTimeout(ctx, n.ttl)
	defer cancel()
	r, err := n.c.Get(ctx, n.prefix+"retired/", clientv3.WithPrefix())
	if err != nil {
		return nil, fmt.Errorf("cluster: retired devices: %w", err)
	}
	out := make(map[string]string, len(r.Kvs))
	for _, kv := range r.Kvs {
		out[strings.TrimPrefix(string(kv.Key), n.prefix+"retired/")] = string(kv.Value)
	}
	return out, nil
}
