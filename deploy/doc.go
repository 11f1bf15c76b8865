// Package deploy holds pulsefleet's deployment files: the systemd unit
// (systemd/), the Kubernetes manifests rendered with kustomize (kubernetes/),
// the ko image configuration (ko/), Prometheus files (prometheus/) and an
// example Alertmanager configuration (alertmanager/). It has no code; its tests render the
// manifests with the kustomize library, decode every object strictly into
// the Kubernetes API types, check that the pieces agree with each other and
// with package shard, and run systemd-analyze on the unit.
//
// deploy/ is a Go module of its own (go.mod here, the product module
// replaced by ../): the Kubernetes and kustomize modules these tests need
// stay out of the product's go.mod. Run its tests with
// `cd deploy && go test ./...`; scripts/test.sh does.
package deploy
