package sim

import (
	"context"
	"fmt"
	"net"
	"testing"
	"time"

	"go.uber.org/goleak"

	"github.com/pulsefleet/pulsefleet/internal/sim/scenario"
	"github.com/pulsefleet/pulsefleet/internal/sim/sink"
)

func TestMain(m *testing.M) {
	goleak.VerifyTestMain(m)
}

// startSink serves a sink on a real loopback socket for the test.
func startSink(t *testing.T, opts sink.Options) *sink.Running {
	t.Helper()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	r := sink.Start(lis, opts)
	t.Cleanup(func() {
		if err := r.Stop(2 * time.Second); err != nil {
			t.Errorf("stop sink: %v", err)
		}
	})
	return r
}

func run(t *testing.T, opts Options) *Report {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	rep, err := Run(ctx, opts)
	if err != nil {
		t.Fatal(err)
	}
	if ctx.Err() != nil {
		t.Fatal("run did not finish within its bound")
	}
	t.Logf("report: %+v", *rep)
	return rep
}

// checkDelivery states the delivery contract of ingest.proto from both
// sides: what the sink accepted (each sequence number once) is exactly what
// the devices were told is durable, corrupt frames are all rejected or
// skipped and never accepted, and acknowledged data never goes backwards.
func checkDelivery(t *testing.T, rep *Report, s *sink.Running) {
	t.Helper()
	var accepted, samples uint64
	for id, dr := range rep.PerDevice {
		ds, ok := s.Device(id)
		if !ok {
			t.Errorf("device %s never reached the sink", id)
			continue
		}
		accepted += ds.Accepted
		samples += ds.Samples
		if ds.Accepted != dr.FramesAcked || ds.Samples != dr.SamplesAcked {
			t.Errorf("device %s: sink accepted %d frames / %d samples, device counts %d / %d acknowledged",
				id, ds.Accepted, ds.Samples, dr.FramesAcked, dr.SamplesAcked)
		}
		if ds.LastSequence != dr.AckedThrough && ds.LastSequence != 0 {
			t.Errorf("device %s: sink holds through %d, device acknowledged through %d", id, ds.LastSequence, dr.AckedThrough)
		}
	}
	if samples != rep.SamplesAcked || accepted != rep.FramesAcked {
		t.Errorf("sink holds %d frames / %d samples, report says %d / %d acknowledged", accepted, samples, rep.FramesAcked, rep.SamplesAcked)
	}
	if rep.UnackedAtEnd != 0 {
		t.Errorf("%d frames unacknowledged after draining", rep.UnackedAtEnd)
	}
	if rep.CorruptAcked != 0 {
		t.Errorf("%d corrupt frames acknowledged", rep.CorruptAcked)
	}
	if rep.CorruptSent != rep.Rejected+rep.CorruptSkipped {
		t.Errorf("corrupt sent %d, want rejected %d + skipped %d", rep.CorruptSent, rep.Rejected, rep.CorruptSkipped)
	}
	if rep.RejectedValid != 0 || rep.ResumeRegress != 0 || rep.OverflowDropped != 0 {
		t.Errorf("valid frames rejected %d, resume regressions %d, overflow %d: want none", rep.RejectedValid, rep.ResumeRegress, rep.OverflowDropped)
	}
	if rep.FramesAcked+rep.Rejected+rep.CorruptSkipped != rep.FramesSent {
		t.Errorf("sent %d frames, acknowledged %d + rejected %d + skipped %d", rep.FramesSent, rep.FramesAcked, rep.Rejected, rep.CorruptSkipped)
	}
}

func TestRawFleetWithFaultsDeliversEveryAcknowledgedChunkOnce(t *testing.T) {
	s := startSink(t, sink.Options{})
	rep := run(t, Options{
		Gateway: s.Addr(), Devices: 20, Mode: ModeRaw, RateHz: 100, Chunk: 25,
		Duration: 2 * time.Second, Seed: 7,
		DropEvery: 400 * time.Millisecond, CorruptRate: 0.1, ClockDriftPPM: 200,
		DevicesPerConn: 8,
	})
	checkDelivery(t, rep, s)
	if rep.FramesSent == 0 || rep.CorruptSent == 0 || rep.DropsInjected == 0 || rep.Reconnects == 0 {
		t.Errorf("faults not exercised: %+v", *rep)
	}
	if rep.Rejected == 0 {
		t.Error("no corrupt frame was rejected")
	}
	if st := s.Stats(); st.Rejected < rep.Rejected {
		t.Errorf("sink rejected %d, devices saw %d rejections", st.Rejected, rep.Rejected)
	}
	if rep.Devices != 20 || len(rep.PerDevice) != 20 {
		t.Errorf("devices %d, per device %d, want 20", rep.Devices, len(rep.PerDevice))
	}
}

func TestSummaryFleetAtSpeedDeliversEverything(t *testing.T) {
	s := startSink(t, sink.Options{})
	rep := run(t, Options{
		Gateway: s.Addr(), Devices: 5, Mode: ModeSummary, Speed: 20,
		Duration: time.Second, Seed: 3, CorruptRate: 0.2,
	})
	checkDelivery(t, rep, s)
	if rep.FramesSent == 0 || rep.SamplesSent != rep.FramesSent {
		t.Errorf("summary frames carry one sample each: sent %d frames, %d samples", rep.FramesSent, rep.SamplesSent)
	}
}

// A store that has accepted a chunk but not yet made it durable welcomes a
// reconnecting device below it; the resent chunk is then stale, and the
// device counts it as held rather than sending it forever.
func TestResendAfterResumeIsRejectedAsStaleAndSettled(t *testing.T) {
	s := startSink(t, sink.Options{DurableLag: 2})
	rep := run(t, Options{
		Gateway: s.Addr(), Devices: 4, Mode: ModeRaw, Duration: 1500 * time.Millisecond, Seed: 11,
		DropEvery: 300 * time.Millisecond, Drain: 300 * time.Millisecond,
	})
	if rep.Stale == 0 || rep.DuplicatesResent == 0 {
		t.Errorf("want stale rejections of resent chunks, got stale %d resent %d", rep.Stale, rep.DuplicatesResent)
	}
	var accepted uint64
	for id := range rep.PerDevice {
		ds, _ := s.Device(id)
		accepted += ds.Accepted
	}
	// The sink never acknowledges its last two chunks per device, so those
	// stay unacknowledged (or were settled as stale); nothing is counted twice.
	if accepted != rep.FramesAcked+rep.UnackedAtEnd {
		t.Errorf("sink accepted %d, devices acknowledged %d + unacknowledged %d", accepted, rep.FramesAcked, rep.UnackedAtEnd)
	}
	if rep.UnackedAtEnd > 2*4 {
		t.Errorf("unacknowledged at end %d, want at most the sink's lag of 2 per device", rep.UnackedAtEnd)
	}
}

func TestRedirectIsFollowed(t *testing.T) {
	owner := startSink(t, sink.Options{})
	front := startSink(t, sink.Options{RedirectTo: owner.Addr()})
	rep := run(t, Options{Gateway: front.Addr(), Devices: 3, Mode: ModeRaw, Duration: time.Second, Seed: 5})
	checkDelivery(t, rep, owner)
	if rep.Redirects < 3 || rep.FramesAcked == 0 {
		t.Errorf("redirects %d, acknowledged %d: want every device redirected and delivering", rep.Redirects, rep.FramesAcked)
	}
	if st := front.Stats(); st.Accepted != 0 {
		t.Errorf("redirecting sink accepted %d frames", st.Accepted)
	}
}

func TestTokensAreSentPerDevice(t *testing.T) {
	tokens := map[string]string{"tok-0001": "alpha", "tok-0002": "bravo"}
	s := startSink(t, sink.Options{Authorize: func(id, tok string) error {
		if tokens[id] != tok {
			return fmt.Errorf("token %q", tok)
		}
		return nil
	}})
	rep := run(t, Options{Gateway: s.Addr(), Devices: 2, IDPrefix: "tok", Tokens: tokens, Mode: ModeSummary, Speed: 10, Duration: time.Second})
	if rep.StreamErrors != 0 || rep.FramesAcked == 0 {
		t.Fatalf("stream errors %d (%s), acknowledged %d", rep.StreamErrors, rep.LastError, rep.FramesAcked)
	}
	// A wrong token is refused and the device keeps retrying with backoff.
	rep = run(t, Options{Gateway: s.Addr(), Devices: 1, IDPrefix: "tok", Token: "wrong", Mode: ModeSummary,
		Speed: 10, Duration: 500 * time.Millisecond, Drain: -1})
	if rep.StreamErrors == 0 || rep.FramesAcked != 0 {
		t.Errorf("wrong token: stream errors %d, acknowledged %d", rep.StreamErrors, rep.FramesAcked)
	}
}

// A device whose id the gateway knows from an earlier run continues the
// gateway's numbering instead of having its new chunks rejected as stale.
func TestSecondRunContinuesNumbering(t *testing.T) {
	s := startSink(t, sink.Options{})
	first := run(t, Options{Gateway: s.Addr(), Devices: 2, Mode: ModeSummary, Speed: 10, Duration: 500 * time.Millisecond})
	second := run(t, Options{Gateway: s.Addr(), Devices: 2, Mode: ModeSummary, Speed: 10, Duration: 500 * time.Millisecond})
	if second.Renumbered != 2 || second.FramesAcked == 0 || second.Stale != 0 {
		t.Errorf("second run: renumbered %d, acknowledged %d, stale %d", second.Renumbered, second.FramesAcked, second.Stale)
	}
	if st := s.Stats(); st.Accepted != first.FramesAcked+second.FramesAcked {
		t.Errorf("sink accepted %d, runs acknowledged %d + %d", st.Accepted, first.FramesAcked, second.FramesAcked)
	}
}

func TestScenarioDeviceGoesOfflineAndCatchesUp(t *testing.T) {
	s := startSink(t, sink.Options{})
	sc := &scenario.Scenario{Name: "t", Duration: 40 * time.Second, Devices: []scenario.Device{
		scenario.DefaultDevice(), scenario.DefaultDevice()}}
	sc.Devices[0].ID, sc.Devices[1].ID = "walker", "sitter"
	sc.Devices[0].Events = []scenario.Event{{At: 10 * time.Second, Kind: scenario.Offline, Hold: 15 * time.Second}}
	rep := run(t, Options{Gateway: s.Addr(), Scenario: sc, Mode: ModeSummary, Speed: 40})
	checkDelivery(t, rep, s)
	// One summary per device second: both devices end with the same count
	// of acknowledged seconds (give or take the start phase), the offline
	// one having resent its buffer.
	w, si := rep.PerDevice["walker"].FramesAcked, rep.PerDevice["sitter"].FramesAcked
	if w < 38 || si < 38 || w > 40 || si > 40 {
		t.Errorf("acknowledged seconds: walker %d, sitter %d, want 38..40 each", w, si)
	}
	if rep.Reconnects == 0 {
		t.Error("offline device never reconnected")
	}
}

// Streams that end under the device while its sends are in flight (a
// gateway whose store write failed) make sends fail; a message whose first
// send failed and that is acknowledged after a resend was counted as
// acknowledged but never as sent (frames_sent counted only after a
// successful first Send). frames_sent counts every distinct message handed
// to a stream, before the send, so it is never below frames_acked.
func TestSentNeverBelowAckedWhenStreamsEnd(t *testing.T) {
	s := startSink(t, sink.Options{EndStreamEvery: 20})
	rep := run(t, Options{
		Gateway: s.Addr(), Devices: 10, Mode: ModeSummary, Speed: 200,
		Duration: 1500 * time.Millisecond, Seed: 5,
	})
	checkDelivery(t, rep, s)
	if rep.Reconnects == 0 || rep.StreamErrors == 0 {
		t.Fatalf("streams never ended: %+v", *rep)
	}
	if rep.FramesSent < rep.FramesAcked || rep.SamplesSent < rep.SamplesAcked {
		t.Errorf("sent %d frames / %d samples, acknowledged %d / %d: acknowledged more than sent",
			rep.FramesSent, rep.SamplesSent, rep.FramesAcked, rep.SamplesAcked)
	}
}
