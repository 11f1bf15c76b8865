package ingest

import (
	"context"
	"math"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// A device resends a message the gateway accepted but has not made durable
// yet (the simulator does so after a rate-limit rewind), and the batch
// holding the original then fails (a full disk). The answer to the resend
// must not be REJECT_REASON_STALE_SEQUENCE ("already held; do not resend"):
// the gateway does not hold it, and the next Welcome resumes before it. A
// device that believed the answer skips the message when it resends from the
// resume point; the gateway accepts its next message across the gap and
// acknowledges through it, so a message acknowledged to the device is in no
// store. The write failure is injected and waited for: no timing involved.
func TestResendOfAMessageNotYetDurableIsNotCalledHeld(t *testing.T) {
	now := time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC)
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	p, err := New(testConfig(db, func() time.Time { return now }, time.Millisecond,
		Limits{Messages: 1e6, Burst: 1e6, DeviceTime: 1e6, DeviceTimeBurst: 24 * time.Hour}))
	if err != nil {
		t.Fatal(err)
	}
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); p.w.run() }()
	defer func() {
		p.w.close()
		wg.Wait()
		db.Close()
	}()
	const id = "stale-1"
	open := func() (*stream, context.Context) {
		ctx, cancel := context.WithCancelCause(context.Background())
		s := &stream{p: p, cancel: cancel, ended: make(chan struct{}), wake: make(chan struct{}, 1)}
		if err := s.start(ctx, &pb.Introduction{DeviceId: id, Mode: pb.Mode_MODE_SUMMARY}); err != nil {
			t.Fatal(err)
		}
		return s, ctx
	}
	end := func(s *stream, ctx context.Context) {
		s.finish(ctx)
		close(s.ended)
		s.cancel(nil)
	}
	devMS := func(seq uint64) int64 { return now.UnixMilli() - 60_000 + int64(seq)*1000 }
	summary := func(seq uint64) *pb.ConnectRequest {
		spo2, pulse, q := 96.0, 70.0, 0.9
		return &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq,
			DeviceTimeUnixMs: devMS(seq), Spo2Pct: &spo2, PulseBpm: &pulse, Quality: &q}}}
	}
	// The device's view: what it was told the gateway holds.
	held := map[uint64]bool{}
	read := func(s *stream) (welcome *pb.Welcome) {
		for _, m := range s.outq {
			if r := m.GetRejection(); r != nil && r.GetReason() == pb.RejectReason_REJECT_REASON_STALE_SEQUENCE {
				held[r.GetSequence()] = true
			}
			if w := m.GetWelcome(); w != nil {
				welcome = w
			}
		}
		s.outq = s.outq[:0]
		return welcome
	}

	s, ctx := open()
	read(s)
	release := make(chan struct{})
	db.InjectWriteFault(func(b *store.Batch) error {
		if len(b.Chunks) == 0 {
			return nil
		}
		<-release // the original is accepted, not durable, while the device resends it
		return store.ErrInjected
	})
	for _, seq := range []uint64{1, 1} {
		if err := s.handle(ctx, summary(seq)); err != nil {
			t.Fatal(err)
		}
	}
	read(s)
	close(release)
	select {
	case <-ctx.Done(): // the failed batch ended the stream
	case <-time.After(10 * time.Second):
		t.Fatal("the injected write failure did not end the stream")
	}
	db.InjectWriteFault(nil)
	end(s, ctx)

	// The device reconnects and resends everything after the resume point
	// that it was not told is held, as the simulator does.
	s2, ctx2 := open()
	defer end(s2, ctx2)
	w := read(s2)
	if w == nil {
		t.Fatal("no Welcome")
	}
	for seq := range held {
		if seq > w.GetResumeAfterSequence() {
			t.Errorf("message %d was answered STALE_SEQUENCE (already held), but the Welcome after its failed write resumes after %d",
				seq, w.GetResumeAfterSequence())
		}
	}
	for seq := w.GetResumeAfterSequence() + 1; seq <= 2; seq++ {
		if held[seq] {
			continue
		}
		if err := s2.handle(ctx2, summary(seq)); err != nil {
			t.Fatal(err)
		}
	}
	if err := p.Flush(context.Background()); err != nil {
		t.Fatal(err)
	}
	acked := s2.acked.Load()
	stored := map[int64]bool{}
	if err := db.Trend(id, 0, math.MaxInt64, func(pt store.Point) bool { stored[pt.TimeMS] = true; return true }); err != nil {
		t.Fatal(err)
	}
	if acked != 2 {
		t.Errorf("acknowledged through %d, want 2", acked)
	}
	for seq := uint64(1); seq <= acked; seq++ {
		if !stored[devMS(seq)] {
			t.Errorf("message %d: acknowledged (through %d), but its trend point is not in the store", seq, acked)
		}
	}
}

// A message refused over the rate limit holds back later ones until the
// device resends it. The hold lapses only RateHoldMS after the device last
// tried it: a resend refused just before the hold would have lapsed (timed
// from the first refusal) must not let the next message in past it, or the
// Ack through that message would cover the refused one, which no store holds.
func TestRateHoldRunsFromTheLastRefusedResend(t *testing.T) {
	nowMS := time.Date(2026, 12, 2, 12, 0, 0, 0, time.UTC).UnixMilli()
	db, err := store.Open(t.TempDir(), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	// One message per 10 s, no burst beyond one.
	p, err := New(testConfig(db, func() time.Time { return time.UnixMilli(nowMS) }, time.Millisecond,
		Limits{Messages: 0.1, Burst: 1, DeviceTime: 1e6, DeviceTimeBurst: 24 * time.Hour}))
	if err != nil {
		t.Fatal(err)
	}
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); p.w.run() }()
	defer func() {
		p.w.close()
		wg.Wait()
		db.Close()
	}()
	ctx, cancel := context.WithCancelCause(context.Background())
	s := &stream{p: p, cancel: cancel, ended: make(chan struct{}), wake: make(chan struct{}, 1)}
	if err := s.start(ctx, &pb.Introduction{DeviceId: "held-1", Mode: pb.Mode_MODE_SUMMARY}); err != nil {
		t.Fatal(err)
	}
	defer func() {
		s.finish(ctx)
		close(s.ended)
		s.cancel(nil)
	}()
	start := nowMS
	send := func(atMS int64, seq uint64) {
		nowMS = atMS
		spo2, pulse, q := 96.0, 70.0, 0.9
		m := &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: seq,
			DeviceTimeUnixMs: start - 60_000 + int64(seq)*1000, Spo2Pct: &spo2, PulseBpm: &pulse, Quality: &q}}}
		if err := s.handle(ctx, m); err != nil {
			t.Fatal(err)
		}
	}
	send(start, 1)                // accepted: the burst's one token
	send(start, 2)                // refused over the limit: the hold starts
	send(start+RateHoldMS-100, 2) // resent, refused again (0.99 tokens)
	send(start+RateHoldMS+50, 3)  // the device's next message, right behind the resend
	s.dev.mu.Lock()
	last, lost := s.dev.cur.LastSeq, s.dev.cur.Lost
	s.dev.mu.Unlock()
	if last != 1 || lost != 0 {
		t.Errorf("accepted through %d with %d counted lost, want 1 and 0: message 3 went in past the refused message 2", last, lost)
	}
}
