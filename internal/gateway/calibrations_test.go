package gateway

import (
	"context"
	"math"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// A calibration stored and assigned to a device model is applied to the
// next stream of a device of that model, named in its welcome, and audited.
func TestAssignedCalibrationIsApplied(t *testing.T) {
	h := newHarness(t, nil)
	ctx := auth.WithActor(context.Background(), "eng-tove")
	// Deliberately offset curve: SpO2 = 100 - 25 R (the textbook line minus 10
	// points), so the estimates show which curve was used.
	curve := "name: proto-c-shifted\nversion: 1\nmodel: linear\ncoefficients: [100, -25]\nratio_min: 0.2\nratio_max: 2\n"
	put, err := h.g.PutCalibration(ctx, &pb.PutCalibrationRequest{CurveYaml: curve})
	if err != nil {
		t.Fatal(err)
	}
	if put.GetCalibration().GetVersion() != 1 {
		t.Fatalf("version %d", put.GetCalibration().GetVersion())
	}
	if _, err := h.g.AssignCalibration(ctx, &pb.AssignCalibrationRequest{Model: "proto-c", Calibration: "proto-c-shifted"}); err != nil {
		t.Fatal(err)
	}
	if _, err := h.g.AssignCalibration(ctx, &pb.AssignCalibrationRequest{Model: "proto-c", Calibration: "nope"}); err == nil {
		t.Error("assigning an unknown calibration must fail")
	}
	in := rawIntro("proto-c-07", 16)
	in.Model = "proto-c"
	d, w := h.connect(t, in)
	if w.GetCalibration() != "proto-c-shifted@v1" {
		t.Fatalf("welcome names calibration %q, want proto-c-shifted@v1", w.GetCalibration())
	}
	const rate, chunk = 100, 25
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 3})
	v := ppgmodel.DefaultVitals()
	v.SpO2Pct = 96 // the model maps 96 % through the textbook line (common practice): R = 0.56
	red, ir := make([]float64, chunk), make([]float64, chunk)
	base := time.Now().Add(-time.Hour).UnixMilli()
	n := rate * 20 / chunk
	for i := 0; i < n; i++ {
		src.Fill(red, ir, nil, v)
		c := &pb.RawChunk{Sequence: uint64(i + 1), DeviceTimeUnixMs: base + int64(i*chunk*1000/rate), SampleRateHz: rate}
		for j := range red {
			c.Red, c.Ir = append(c.Red, uint32(red[j])), append(c.Ir, uint32(ir[j]))
		}
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
	}
	d.waitAck(uint64(n))
	var last store.Point
	h.db.Trend("proto-c-07", 0, math.MaxInt64, func(p store.Point) bool { last = p; return true })
	if math.Abs(last.SpO2-86) > 1.5 {
		t.Errorf("SpO2 %.1f with the shifted curve, want about 86 (96 on the textbook line minus 10)", last.SpO2)
	}
	au, _ := h.db.Audit(0, "calibration.", 0)
	if len(au) != 2 || au[0].Actor != "eng-tove" {
		t.Errorf("audit: %+v", au)
	}
}
