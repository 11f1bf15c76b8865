// Package controlplane shares a fleet's settings between its gateways
// through etcd: each change is one key under PREFIX/cp/, written by the
// gateway that took it, and applied by every gateway from a watch (within
// the watch latency: milliseconds on a healthy etcd; the stated target is
// 2 s, checked by the tests). Each gateway also writes what it applies into
// its own store, so it keeps serving with the last known settings while
// etcd is unreachable, and starts with them after a restart.
//
// Shared: credentials (hashes only: store.Token never holds a secret), with
// their roles and revocations; alarm profiles (the fleet's default and
// per-device ones; a gateway that has not seen the device holds its profile
// for the device's first connection); calibration curves, every version,
// numbered by the fleet (PublishCalibration: a create-only transaction per
// version, so two gateways never give one number to two curves), and their
// assignments to a model or a device; the operator's device labels (a
// device's own labels, sent in each introduction, travel with it); history
// stays in each gateway's store.
//
// While etcd is unreachable (a probe every second, and every failed write)
// Up reports false with the time since when, /readyz says "degraded", the
// metric pulsefleet_controlplane_up is 0, and every change is refused with
// ErrUnreachable before anything is written anywhere, so no gateway holds a
// setting the others cannot get. When etcd answers again the watch resumes
// from its last revision and every change made meanwhile through another
// gateway is applied.
//
// Keys: PREFIX/cp/tokens/HASH -> {"gateway": ADDR, "token": store.Token};
// PREFIX/cp/profiles/DEVICE (or _default) -> {"gateway": ADDR, "profile":
// Profile}; PREFIX/cp/calibrations/NAME/VERSION (ten digits) ->
// {"gateway": ADDR, "calibration": store.Calibration};
// PREFIX/cp/calassign/TARGET ("model:M" or "device:ID") -> {"gateway":
// ADDR, "assignment": Assignment} (an empty Ref removes it);
// PREFIX/cp/labels/DEVICE -> {"gateway": ADDR, "labels": Labels}. A snapshot
// (Start) is applied in the order the keys were written, so a calibration
// comes before an assignment naming it.
// Nothing is deleted: a revoked credential stays, with its revocation time.
//
// Ownership of goroutines: Start runs the watch and the probe; Close stops
// both and waits for them.
package controlplane
