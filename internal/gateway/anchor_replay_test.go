package gateway

import (
	"context"
	"fmt"
	"math"
	"os"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/calibration/pairing"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Replaying real camera recordings (testdata/camera-oximetry, b as the
// first channel and g as the second, 30 Hz) through a real gateway over
// gRPC with the anchored curve that 'calibrate pairs --anchor 60' and
// 'calibrate' made from them (testdata/camera-bg-anchored.yaml) reproduces
// the study's per-second predictions: curve(R / R0), R from the same
// estimator over the recording, R0 its room-air anchor (calibration.Anchor,
// as the study takes it). The gateway gives no value during the anchor's
// 60 s (the study anchors afterwards and predicts those seconds too) and,
// after it, the same value each second within 0.01 % SpO2 (frame means are
// sent as 24-bit codes, frame mean x 32768, so rounding moves R by < 1e-6).
func TestCameraReplayReproducesStudyPredictions(t *testing.T) {
	curveYAML, err := os.ReadFile("testdata/camera-bg-anchored.yaml")
	if err != nil {
		t.Fatal(err)
	}
	curve, err := calibration.Parse(curveYAML)
	if err != nil {
		t.Fatal(err)
	}
	h := newHarness(t, nil)
	if err := h.g.SetSecurity(SecurityOptions{DeviceTimeRate: 1e6, DeviceTimeBurst: 1e6 * time.Second}); err != nil {
		t.Fatal(err)
	}
	ctx := auth.WithActor(context.Background(), "eng-tove")
	if _, err := h.g.PutCalibration(ctx, &pb.PutCalibrationRequest{CurveYaml: string(curveYAML)}); err != nil {
		t.Fatal(err)
	}
	for i, rec := range []string{"subject-2/ppg_left.csv", "subject-4/ppg_right.csv"} {
		t.Run(rec, func(t *testing.T) {
			replayCamera(t, h, curve, "../../testdata/camera-oximetry/"+rec, fmt.Sprintf("cam-replay-%d", i))
		})
	}
}

func replayCamera(t *testing.T, h *harness, curve *calibration.Curve, path, id string) {
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	raw, err := pairing.ReadRaw(f, "b", "g")
	f.Close()
	if err != nil {
		t.Fatal(err)
	}
	const rate = 30
	// The study's side: per-second ratios, the anchor, the predictions.
	dev, err := pairing.DeviceSeconds(raw, pairing.Options{RateHz: rate, ADCBits: estimator.ADCBitsAuto})
	if err != nil {
		t.Fatal(err)
	}
	spec := curve.AnchorSpec()
	r0, _, ok, err := calibration.Anchor(dev, calibration.AnchorOptions{LengthS: spec.LengthS, MinSQI: spec.MinSQI, MinSeconds: spec.MinSeconds})
	if err != nil || !ok {
		t.Fatalf("study anchor: %v %v", ok, err)
	}
	first := int64(-1)
	for _, d := range dev {
		if first < 0 && d.Ratio > 0 && d.SQI >= spec.MinSQI {
			first = d.Second
		}
	}
	// The gateway's side.
	in := &pb.Introduction{DeviceId: id, Model: "camera", Mode: pb.Mode_MODE_RAW, AdcBits: 24, CalibrationId: "camera-bg-anchored"}
	d, w := h.connect(t, in)
	if w.GetCalibration() != "camera-bg-anchored@v1" {
		t.Fatalf("welcome: calibration %q", w.GetCalibration())
	}
	base := time.Now().Add(-2 * time.Hour).UnixMilli()
	const chunk = 300 // 10 s
	var seq uint64
	for i := 0; i+chunk <= min(len(raw.Red), len(raw.IR)); i += chunk {
		seq++
		c := &pb.RawChunk{Sequence: seq, DeviceTimeUnixMs: base + int64(i)*1000/rate, SampleRateHz: rate,
			Red: make([]uint32, chunk), Ir: make([]uint32, chunk)}
		for j := 0; j < chunk; j++ {
			c.Red[j], c.Ir[j] = uint32(math.Round(raw.Red[i+j]*32768)), uint32(math.Round(raw.IR[i+j]*32768))
		}
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
	}
	d.waitAck(seq)
	got := map[int64]store.Point{}
	h.db.Trend(id, 0, math.MaxInt64, func(p store.Point) bool { got[(p.TimeMS-base)/1000-1] = p; return true })

	var compared, duringAnchor, valueInAnchor, mismatched int
	var worst float64
	for _, s := range dev {
		p, ok := got[s.Second]
		if !ok {
			continue // the last partial chunk was not sent
		}
		if s.Second < first+int64(spec.LengthS) {
			duringAnchor++
			if !math.IsNaN(p.SpO2) || p.Flags&uint16(estimator.FlagAnchoring) == 0 {
				valueInAnchor++
			}
			continue
		}
		want, wok := curve.SpO2(s.Ratio / r0)
		if math.IsNaN(s.Ratio) {
			wok = false
		}
		if wok != !math.IsNaN(p.SpO2) {
			mismatched++
			continue
		}
		if wok {
			compared++
			worst = math.Max(worst, math.Abs(p.SpO2-want))
		}
	}
	t.Logf("%s: R0 %.4f from second %d; %d anchor seconds, %d seconds compared, worst |gateway - study| %.2g %% SpO2, %d differ in having a value",
		path, r0, first, duringAnchor, compared, worst, mismatched)
	if duringAnchor < spec.LengthS-1 || valueInAnchor != 0 {
		t.Errorf("anchor phase: %d seconds, %d with a value or without flag 32; want %d seconds of not available", duringAnchor, valueInAnchor, spec.LengthS)
	}
	if compared < 200 || worst > 0.01 || mismatched > compared/100 {
		t.Errorf("after the anchor: %d seconds compared, worst difference %.3g %% SpO2, %d differ in having a value; want the study's predictions within 0.01 %%", compared, worst, mismatched)
	}
}
