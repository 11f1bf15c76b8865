package ingest

import (
	"fmt"

	"github.com/pulsefleet/pulsefleet/estimator"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// AnchorKeepS is how long, in seconds of gateway time, a device may be
// disconnected and keep its room-air anchor: a reconnect within it is the
// same wear session; a longer absence, another calibration, summary mode
// or a gateway restart (anchors live in memory) starts a new anchor.
const AnchorKeepS = 60

// anchored reports whether c maps the anchored ratio R/R0.
func anchored(c estimator.Calibration) bool {
	a, ok := c.(estimator.AnchoredInput)
	return ok && a.AnchorSpec().LengthS != 0
}

// adoptAnchor prepares the stream for a calibration on the anchored ratio
// (estimator.AnchoredInput): the device's anchor is kept when the same
// calibration's stream ended at most AnchorKeepS ago, else a new one
// starts; the estimator itself then gives no SpO2 (the anchor does). For
// any other calibration the device's anchor is dropped. Runs before
// attach, after an older stream of the device has ended.
func (s *stream) adoptAnchor(nowMS int64) error {
	d := s.dev
	var spec estimator.AnchorSpec
	if a, ok := s.cal.(estimator.AnchoredInput); ok && s.mode == pb.Mode_MODE_RAW {
		spec = a.AnchorSpec()
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	if spec.LengthS == 0 {
		d.anchor, d.anchorRef, d.spo2Note = nil, "", ""
		return nil
	}
	kept := d.anchor != nil && d.anchorRef == s.calRef && d.stream == nil && nowMS-d.anchorLeftMS <= AnchorKeepS*1000
	if !kept {
		a, err := estimator.NewAnchor(s.cal)
		if err != nil {
			return fmt.Errorf("calibration %s: %w", s.calRef, err)
		}
		d.anchor, d.anchorRef = a, s.calRef
		d.spo2Note = a.Status()
	}
	s.anchor, s.cal = d.anchor, estimator.NoCalibration()
	s.p.log.Info("calibration anchor", "device", d.id, "calibration", s.calRef, "anchor_s", spec.LengthS,
		"kept", kept, "status", d.anchor.Status())
	return nil
}

// applyAnchor sets the SpO2 of the estimates just made from the device's
// anchor and records why SpO2 is withheld while the anchor is in progress.
func (s *stream) applyAnchor() {
	if s.anchor == nil || len(s.estOut) == 0 {
		return
	}
	_, before := s.anchor.R0()
	for i := range s.estOut {
		s.anchor.Apply(&s.estOut[i])
	}
	r0, after := s.anchor.R0()
	switch {
	case after && !before:
		s.p.log.Info("calibration anchor complete", "device", s.dev.id, "calibration", s.calRef, "r0", r0)
	case before && !after:
		s.p.log.Info("calibration anchor started over", "device", s.dev.id, "calibration", s.calRef, "why", "sensor off or device clock went back")
	}
	s.spo2Note = s.anchor.Status()
}
