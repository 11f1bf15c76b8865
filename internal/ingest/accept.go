package ingest

import (
	"context"
	"math"
	"time"

	"google.golang.org/protobuf/proto"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// loop receives and processes data messages until the stream ends.
func (s *stream) loop(ctx context.Context) error {
	for {
		m, err := s.recv(ctx)
		if err != nil {
			return err // endStatus maps it
		}
		if err := s.handle(ctx, m); err != nil {
			return err
		}
	}
}

// handle processes one message; an error ends the stream.
func (s *stream) handle(ctx context.Context, m *pb.ConnectRequest) error {
	p := s.p
	nowMS := p.nowMS()
	if s.rateLimited(m, nowMS) {
		return nil
	}
	if n := proto.Size(m); n > p.cfg.MaxMessageBytes {
		s.countReject()
		s.rejectMsg(reject(seqOf(m), pb.RejectReason_REJECT_REASON_TOO_LARGE, "message", "%d bytes, want at most %d", n, p.cfg.MaxMessageBytes))
		return nil
	}
	switch k := m.Kind.(type) {
	case *pb.ConnectRequest_Introduction:
		s.countReject()
		s.rejectMsg(reject(0, pb.RejectReason_REJECT_REASON_NOT_INTRODUCED, "introduction", "already introduced as %s; open a new stream to change it", s.dev.id))
	case *pb.ConnectRequest_Status:
		if r := validateStatus(k.Status); r != nil {
			s.countReject()
			s.rejectMsg(r)
			return nil
		}
		s.dev.mu.Lock()
		s.dev.desc.BatteryPct = k.Status.GetBatteryPct()
		s.dev.mu.Unlock()
	case *pb.ConnectRequest_Summary:
		if s.mode != pb.Mode_MODE_SUMMARY {
			s.countReject()
			s.rejectMsg(reject(k.Summary.GetSequence(), pb.RejectReason_REJECT_REASON_WRONG_MODE, "summary", "device introduced itself in raw mode"))
			return nil
		}
		if r := validateSummary(k.Summary); r != nil {
			s.countReject()
			s.rejectMsg(r)
			return nil
		}
		return s.accept(ctx, k.Summary.GetSequence(), "summary.device_time_unix_ms", k.Summary.GetDeviceTimeUnixMs(), 0, 0, nowMS, func(rec *record) {
			sm := k.Summary
			p := store.Point{Device: s.dev.id, TimeMS: sm.GetDeviceTimeUnixMs(), SpO2: val(sm.Spo2Pct), Pulse: val(sm.PulseBpm),
				PI: val(sm.PiPct), SQI: val(sm.Quality), Ratio: math.NaN(), Source: uint8(pb.Source_SOURCE_DEVICE)}
			rec.points = append(rec.points, p)
		})
	case *pb.ConnectRequest_RawChunk:
		c := k.RawChunk
		if s.mode != pb.Mode_MODE_RAW {
			s.countReject()
			s.rejectMsg(reject(c.GetSequence(), pb.RejectReason_REJECT_REASON_WRONG_MODE, "raw_chunk", "device introduced itself in summary mode"))
			return nil
		}
		if r := validateRaw(c, s.adc, p.cfg.MaxChunkSamples); r != nil {
			s.countReject()
			s.rejectMsg(r)
			return nil
		}
		spanMS := int64(float64(len(c.GetRed())) * 1000 / c.GetSampleRateHz())
		return s.accept(ctx, c.GetSequence(), "raw_chunk.device_time_unix_ms", c.GetDeviceTimeUnixMs(), uint32(len(c.GetRed())), spanMS, nowMS, func(rec *record) {
			s.estimate(c, rec)
			if p.cfg.CaptureRaw {
				rec.raw = &store.RawCapture{Device: s.dev.id, Seq: c.GetSequence(), DeviceTimeMS: c.GetDeviceTimeUnixMs(),
					RateHz: c.GetSampleRateHz(), Red: c.GetRed(), IR: c.GetIr(), Ambient: c.GetAmbient()}
			}
		})
	default:
		s.countReject()
		s.rejectMsg(invalid(0, "kind", "empty message, want introduction, raw_chunk, summary or status"))
	}
	return nil
}

func val(p *float64) float64 {
	if p == nil {
		return math.NaN()
	}
	return *p
}

func (s *stream) countReject() {
	s.dev.mu.Lock()
	s.dev.cur.Rejected++
	s.dev.mu.Unlock()
}

// accept applies the sequence rules and the device time policy (clock.go)
// to a valid data message, lets fill add its effects, runs the alarm engine
// over new points, and queues the record. field names the message's device
// time; spanMS is the device time it covers (raw chunks).
func (s *stream) accept(ctx context.Context, seq uint64, field string, devMS int64, samples uint32, spanMS, nowMS int64, fill func(*record)) error {
	p, d := s.p, s.dev
	gap, evs, admitted, err := s.admit(ctx, seq, field, devMS, samples, spanMS, nowMS)
	if !admitted {
		return err
	}
	rec := &record{dev: d, stream: s, seq: seq, epoch: s.epoch, received: time.UnixMilli(nowMS),
		chunk: &store.Chunk{Device: d.id, Seq: seq, DeviceTimeMS: devMS, ArrivalMS: nowMS, Samples: samples}}
	if gap > 0 && s.tl != nil {
		s.tl.Gap() // samples are missing: the estimator must not bridge them
	}
	fill(rec)
	s.evaluate(rec, evs)
	mode := "raw"
	if samples == 0 {
		mode = "summary"
	}
	p.m.messages.WithLabelValues(mode).Inc()
	p.m.samples.Add(float64(samples))
	if err := p.w.submit(ctx, rec); err != nil {
		if c := context.Cause(ctx); c != nil {
			return c
		}
		return errorf(Unavailable, "store: %v", err)
	}
	return nil
}

// admit applies the sequence rules and the device time policy to a data
// message and, when it is admitted, moves the device's cursor past it. It
// returns the sequence numbers skipped before it and the alarm events the
// clock policy raised. A message not admitted (stale, or refused for its
// device time) has been answered with its rejection; err is then what ends
// the stream, if anything does.
func (s *stream) admit(ctx context.Context, seq uint64, field string, devMS int64, samples uint32, spanMS, nowMS int64) (gap uint64, evs []alarms.Event, admitted bool, err error) {
	p, d := s.p, s.dev
	d.mu.Lock()
	if d.stream != s || d.epoch.Load() != s.epoch {
		// A batch with this device's data failed (or a newer stream took
		// over): nothing more is accepted on this stream.
		d.mu.Unlock()
		if c := context.Cause(ctx); c != nil {
			return 0, nil, false, c
		}
		return 0, nil, false, ErrReplaced
	}
	last := d.cur.LastSeq
	if seq <= last {
		d.cur.Duplicates++
		durable := d.durableSeq
		d.mu.Unlock()
		p.m.duplicates.Inc()
		if seq <= durable {
			s.rejectMsg(reject(seq, pb.RejectReason_REJECT_REASON_STALE_SEQUENCE, "sequence",
				"%d is not above %d, the last durable; it is already held (never stored twice)", seq, durable))
		}
		// Else the original is accepted but not durable yet: no answer of
		// its own. STALE_SEQUENCE ("already held; do not resend") would be
		// false if the original's batch then fails, and a device that
		// believed it would skip the message when it resends from the next
		// Welcome's resume point; the next message would be accepted
		// across the gap and acknowledged through it. The original's Ack
		// answers the resend, or its failure ends the stream (doc.go,
		// "Delivery").
		return 0, nil, false, nil
	}
	rej, late := d.admitTime(seq, field, devMS, samples, spanMS, nowMS, p.cfg.LateAfter, func(e alarms.Event) { evs = append(evs, e) })
	if rej != nil {
		// Refused for its device time: nothing of it is stored or
		// evaluated; the clock fault it raised is.
		d.cur.Rejected++
		rec := &record{dev: d}
		p.alarmEffects(d, evs, rec)
		d.mu.Unlock()
		s.rejectMsg(rej)
		if rec.alarm != nil || len(rec.episodes) > 0 {
			if err := p.w.submit(ctx, rec); err != nil {
				return 0, nil, false, errorf(Unavailable, "store: %v", err)
			}
		}
		return 0, nil, false, nil
	}
	gap = seq - last - 1
	if last == 0 && d.durableSeq == 0 && d.cur.Chunks == 0 {
		gap = 0 // a device's first message may start anywhere
	}
	d.cur.Lost += gap
	d.cur.LastSeq = seq
	d.cur.Chunks++
	d.cur.Samples += uint64(samples)
	d.cur.LastSeenMS = nowMS
	// Quality accounting (admitTime): clock drift, effective rate, and
	// lateness against the least-delayed recent messages (immune to resent
	// backlogs).
	if late {
		d.cur.Late++
	}
	d.mu.Unlock()
	if gap > 0 {
		p.m.lost.Add(float64(gap))
	}
	if late {
		p.m.late.Inc()
	}
	return gap, evs, true, nil
}

// evaluate runs the device's alarm engine over the record's trend points
// (after the events evs already raised for the message), accounts their
// quality, attaches the effects and the cursor to rec, and publishes the
// points to watchers.
func (s *stream) evaluate(rec *record, evs []alarms.Event) {
	p, d := s.p, s.dev
	collect := func(e alarms.Event) { evs = append(evs, e) }
	d.mu.Lock()
	for i := range rec.points {
		pt := &rec.points[i]
		d.q.addPoint(pt)
		d.evalPoint(pt, collect)
	}
	if n := len(rec.points); n > 0 {
		d.latest = TrendPointProto(&rec.points[n-1])
		if s.anchor != nil {
			d.spo2Note = s.spo2Note
		}
	}
	p.alarmEffects(d, evs, rec)
	rec.cursor = d.cur
	d.mu.Unlock()
	for i := range rec.points {
		p.m.trendPoints.WithLabelValues(sourceLabel(rec.points[i].Source)).Inc()
		if p.hub.hasWatchers() {
			p.hub.publish(d.id, &pb.WatchEventsResponse{Event: &pb.WatchEventsResponse_TrendPoint{TrendPoint: TrendPointProto(&rec.points[i])}})
		}
	}
}

func sourceLabel(s uint8) string {
	if s == uint8(pb.Source_SOURCE_DEVICE) {
		return "device"
	}
	return "gateway"
}

// estimate runs the estimator over a raw chunk and adds one trend point per
// completed second to rec. The timeline restarts the estimator on a new
// rate, a device-time jump of more than a second, or a gap (accept).
func (s *stream) estimate(c *pb.RawChunk, rec *record) {
	p := s.p
	if s.tl == nil {
		tl, err := estimator.NewTimeline(estimator.Config{ADCBits: int(s.adc), Calibration: s.cal})
		if err != nil {
			p.log.Warn("estimator", "device", s.dev.id, "err", err)
			return
		}
		s.tl = tl
	}
	var err error
	s.estOut, err = s.tl.PushCodes(c.GetDeviceTimeUnixMs(), c.GetSampleRateHz(), c.GetRed(), c.GetIr(), c.GetAmbient(), s.estOut[:0])
	if err != nil {
		p.log.Warn("estimator", "device", s.dev.id, "err", err)
		return
	}
	s.applyAnchor()
	for _, e := range s.estOut {
		pt := store.Point{Device: s.dev.id, TimeMS: e.TimeMS, SpO2: e.SpO2Pct, Pulse: e.PulseBPM,
			PI: e.PIPct, SQI: e.SQI, Ratio: e.Ratio, Flags: uint16(e.Flags), Source: uint8(pb.Source_SOURCE_GATEWAY)}
		rec.points = append(rec.points, pt)
		if math.IsNaN(e.SpO2Pct) {
			p.m.estimatorSeconds.WithLabelValues("withheld").Inc()
		} else {
			p.m.estimatorSeconds.WithLabelValues("valid").Inc()
		}
		for _, f := range flagNames {
			if e.Flags.Has(f.flag) {
				p.m.estimatorFlags.WithLabelValues(f.name).Inc()
			}
		}
	}
}

var flagNames = []struct {
	flag estimator.Flags
	name string
}{{estimator.FlagNoPulse, "no_pulse"}, {estimator.FlagSensorOff, "sensor_off"}, {estimator.FlagClipping, "clipping"},
	{estimator.FlagMotion, "motion"}, {estimator.FlagLowResolution, "low_resolution"}, {estimator.FlagAnchoring, "anchoring"}}
