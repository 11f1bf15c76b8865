package gateway

import (
	"context"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// anchoredTestCurve maps the anchored ratio x = R/R0: SpO2 = 110 - 14 x.
// On the model's textbook line a person at 96 % has R = 0.56, so with that
// room-air anchor x = 1 reads 96 %, and 88 % (R = 0.88, x = 1.57) reads
// about 88 %.
const anchoredTestCurve = `name: cam-anchored
version: 1
model: linear
coefficients: [110, -14]
ratio_min: 0.3
ratio_max: 3
input: anchored_ratio
anchor_s: 20
anchor_min_sqi: 0.5
anchor_min_seconds: 5
`

// rawFeeder sends model PPG at given saturations as raw chunks on the
// device clock.
type rawFeeder struct {
	src  *ppgmodel.Source
	seq  uint64
	tMS  int64
	red  []float64
	ir   []float64
	rate int
}

func newRawFeeder() *rawFeeder {
	const rate, chunk = 100, 25
	return &rawFeeder{src: ppgmodel.New(ppgmodel.Config{SampleRateHz: rate, ADCBits: 16, Seed: 5}), rate: rate,
		red: make([]float64, chunk), ir: make([]float64, chunk), tMS: time.Now().Add(-time.Hour).UnixMilli()}
}

// feed sends seconds of signal at spo2 and waits until they are acknowledged.
func (f *rawFeeder) feed(d *testDevice, seconds int, spo2 float64) {
	v := ppgmodel.DefaultVitals()
	v.SpO2Pct = spo2
	for i := 0; i < seconds*f.rate/len(f.red); i++ {
		f.src.Fill(f.red, f.ir, nil, v)
		f.seq++
		c := &pb.RawChunk{Sequence: f.seq, DeviceTimeUnixMs: f.tMS, SampleRateHz: float64(f.rate)}
		for j := range f.red {
			c.Red, c.Ir = append(c.Red, uint32(f.red[j])), append(c.Ir, uint32(f.ir[j]))
		}
		f.tMS += int64(len(f.red) * 1000 / f.rate)
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: c}})
	}
	d.waitAck(f.seq)
}

// A curve on the anchored ratio, assigned to a model and applied by a real
// gateway over gRPC: SpO2 is not available (flag 32, the device's
// spo2_note says why) until the room-air anchor is complete, then it is
// the curve at R/R0; a reconnect keeps the anchor.
func TestAnchoredCalibrationThroughGateway(t *testing.T) {
	prof, err := alarms.ParseProfile([]byte(`name: anchor-test
conditions:
  - kind: spo2_low
    limit: 90
    hysteresis: 1
    delay: 3s
    priority: medium
  - kind: signal_lost
    delay: 5s
    priority: low
`))
	if err != nil {
		t.Fatal(err)
	}
	h := newHarness(t, func(o *Options) { o.DefaultProfile = prof })
	ctx := auth.WithActor(context.Background(), "eng-tove")
	if _, err := h.g.PutCalibration(ctx, &pb.PutCalibrationRequest{CurveYaml: anchoredTestCurve}); err != nil {
		t.Fatal(err)
	}
	if _, err := h.g.AssignCalibration(ctx, &pb.AssignCalibrationRequest{Model: "cam-proto", Calibration: "cam-anchored"}); err != nil {
		t.Fatal(err)
	}
	in := rawIntro("cam-01", 16)
	in.Model = "cam-proto"
	d, w := h.connect(t, in)
	if w.GetCalibration() != "cam-anchored@v1" {
		t.Fatalf("welcome names calibration %q", w.GetCalibration())
	}
	f := newRawFeeder()
	f.feed(d, 15, 96) // the estimator's first values and part of the anchor
	dev, err := h.fleet().GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: "cam-01"})
	if err != nil {
		t.Fatal(err)
	}
	note := dev.GetDevice().GetSpo2Note()
	if !strings.HasPrefix(note, "calibration anchor in progress, ") || !strings.HasSuffix(note, " s of 20") || dev.GetDevice().GetLatest().Spo2Pct != nil ||
		dev.GetDevice().GetLatest().GetFlags()&32 == 0 {
		t.Fatalf("during the anchor: note %q, latest %v; want SpO2 absent, flag 32 and the note", note, dev.GetDevice().GetLatest())
	}
	// The web page's JSON carries the reason (device.js shows it).
	var page struct {
		Device struct {
			Spo2Note string `json:"spo2_note"`
		} `json:"device"`
	}
	if webGet(t, "http://"+h.httpAddr+"/api/device/cam-01", &page); !strings.HasPrefix(page.Device.Spo2Note, "calibration anchor in progress, ") {
		t.Errorf("web device JSON: spo2_note %q, want the anchor's progress", page.Device.Spo2Note)
	}
	// The alarm engine sees SpO2 as missing: its technical condition for that
	// (signal_lost) is announced; SpO2 conditions do not evaluate.
	if c := dev.GetDevice().GetActiveConditions(); len(c) != 1 || c[0] != "signal_lost" {
		t.Errorf("active conditions during the anchor: %v, want [signal_lost]", c)
	}
	f.feed(d, 30, 96)
	dev, _ = h.fleet().GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: "cam-01"})
	if c := dev.GetDevice().GetActiveConditions(); len(c) != 0 {
		t.Errorf("active conditions at 96 %% after the anchor: %v, want none", c)
	}
	f.feed(d, 30, 88)
	dev, _ = h.fleet().GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: "cam-01"})
	if c := dev.GetDevice().GetActiveConditions(); len(c) != 1 || c[0] != "spo2_low" {
		t.Errorf("active conditions at 88 %% after the anchor: %v, want [spo2_low] (the curve's value is evaluated)", c)
	}
	type span struct{ from, to int64 }
	points := func(s span) (valid, anchoring, withFlagAndValue int, mean float64) {
		h.db.Trend("cam-01", s.from, s.to, func(p store.Point) bool {
			if p.Flags&32 != 0 {
				anchoring++
				if !math.IsNaN(p.SpO2) {
					withFlagAndValue++
				}
			} else if !math.IsNaN(p.SpO2) {
				valid++
				mean += p.SpO2
			}
			return true
		})
		return valid, anchoring, withFlagAndValue, mean / float64(max(valid, 1))
	}
	start := f.tMS - 75_000
	v, a, both, _ := points(span{start, start + 20_000})
	if v != 0 || a == 0 || both != 0 {
		t.Errorf("first 20 s: %d valid SpO2 values, %d anchoring seconds (%d of them with a value); want no value while anchoring", v, a, both)
	}
	v, a, _, mean := points(span{start + 45_000 - 15_000, start + 45_000})
	if a != 0 || v < 10 || math.Abs(mean-96) > 1.5 {
		t.Errorf("at 96 %% after the anchor: %d valid, %d anchoring, mean %.1f; want about 96", v, a, mean)
	}
	v, _, _, mean = points(span{f.tMS - 12_000, f.tMS})
	if v < 8 || math.Abs(mean-88) > 2.5 {
		t.Errorf("at 88 %% after the anchor: %d valid, mean %.1f; want about 88 (the curve at R/R0)", v, mean)
	}
	dev, _ = h.fleet().GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: "cam-01"})
	if dev.GetDevice().GetSpo2Note() != "" {
		t.Errorf("note after the anchor: %q, want none", dev.GetDevice().GetSpo2Note())
	}

	// A reconnect within the same session keeps the anchor: values at once.
	d.close()
	d2, _ := h.connect(t, in)
	from := f.tMS
	f.feed(d2, 15, 96)
	v, a, _, mean = points(span{from, f.tMS})
	if a != 0 || v < 3 || math.Abs(mean-96) > 2 {
		t.Errorf("after a reconnect: %d valid, %d anchoring, mean %.1f; want the anchor kept", v, a, mean)
	}
}
