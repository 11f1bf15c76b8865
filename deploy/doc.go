// Package deploy holds pulsefleet's deployment files: the systemd unit
// (systemd/), the Kubernetes manifests rendered with kustomize (kubernetes/)
// and the ko image configuration (ko/). It has no code; its tests render the
// manifests with the kustomize library, decode every object strictly into
// the Kubernetes API types, check that the pieces agree with each other and
// with package shard, and run systemd-analyze on the unit.
package deploy
