package relay

import (
	"encoding/json"
	"math"
	"time"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Live-source clock rules.
const (
	// LiveGapAfter: without a time column, a live source whose lines fall
	// this far behind the declared rate has stopped for a while (samples
	// were lost): the clock is set forward to the line's arrival and a gap
	// is counted.
	LiveGapAfter = 5 * time.Second
	// absoluteMS: a time column at or above this (2001-09-09) is Unix time.
	absoluteMS = 1e12
	// inferSamples is how many samples are buffered to infer the rate from
	// the time column when none is declared (as the estimate command does).
	inferSamples = 256
)

// Chunk is one data message and where the input stood after it.
type Chunk struct {
	Msg     *pb.ConnectRequest
	Samples int
	Mark    Mark
}

// Mark is the input position and clock after a chunk's last sample: what a
// restarted relay needs to go on from there (kept in the spool).
type Mark struct {
	Offset   int64   `json:"off"`              // input bytes consumed
	AnchorMS float64 `json:"anchor_ms"`        // device time of the clock's origin
	OriginMS float64 `json:"origin_ms"`        // time-column value at the origin (NaN-free: 0 without one)
	K        int64   `json:"k"`                // samples since the origin (no time column)
	RateHz   float64 `json:"rate_hz"`          // rate in use
	LastMS   float64 `json:"last_ms"`          // device time of the last sample
	Absolute bool    `json:"absolute"`         // the time column is Unix time
	Started  bool    `json:"started,omitzero"` // the clock is set
}

// Encode returns the mark as JSON.
func (m Mark) Encode() []byte { b, _ := json.Marshal(m); return b }

// DecodeMark reads a mark written by Encode.
func DecodeMark(b []byte) (Mark, error) {
	var m Mark
	err := json.Unmarshal(b, &m)
	return m, err
}

// AssemblerConfig configures an Assembler.
type AssemblerConfig struct {
	Format Format
	// RateHz is the declared rate (raw: 25..1000; summary: lines per
	// second, 0 means 1). 0 in raw mode: inferred from the time column.
	RateHz float64
	// Live: stamp by arrival (the anchor is the first line's arrival, and
	// lines falling LiveGapAfter behind set the clock forward).
	Live bool
	// AnchorMS is the device time of the first sample when not Live
	// (Unix ms); ignored for an absolute time column.
	AnchorMS float64
	// MaxChunk bounds samples per raw chunk; 0 means the rate's one second
	// (at most 1000).
	MaxChunk int
}

// Assembler stamps samples and groups raw samples into chunks (a summary
// line is a message of its own). Not safe for concurrent use.
type Assembler struct {
	cfg     AssemblerConfig
	m       Mark
	pending []Sample // raw with a time column and no rate yet
	pendOff []int64
	arrival []time.Time

	red, ir, amb []uint32
	hasAmb       bool
	startMS      float64
	firstAt      time.Time // arrival of the current chunk's first sample
	endMark      Mark
	gaps         int
	lastStart    float64 // device time of the last message's start (rounded ms)
	started      bool
}

// NewAssembler returns an assembler; resume (from a spool) continues the
// clock of an earlier run when not nil.
func NewAssembler(cfg AssemblerConfig, resume *Mark) *Assembler {
	if cfg.Format == Summary && cfg.RateHz == 0 {
		cfg.RateHz = 1
	}
	a := &Assembler{cfg: cfg}
	a.m.RateHz = cfg.RateHz
	if resume != nil && resume.Started {
		a.m = *resume
		a.lastStart, a.started = math.Round(resume.LastMS), true
		if cfg.RateHz != 0 {
			a.m.RateHz = cfg.RateHz
		}
	}
	return a
}

// Gaps is how many gaps were found (time column jumps, live stalls, reopened sources).
func (a *Assembler) Gaps() int { return a.gaps }

// Break marks a gap (a reopened source): the next sample starts a new run
// on the arrival clock.
func (a *Assembler) Break() []Chunk {
	out := a.flush(nil)
	if a.m.Started && a.cfg.Live {
		a.m.Started = false
		a.gaps++
	}
	return out
}

// RateHz is the rate in use (0 while being inferred).
func (a *Assembler) RateHz() float64 { return a.m.RateHz }

// Add stamps one sample that ended at input offset off and arrived at at,
// and returns the chunks it completes.
func (a *Assembler) Add(s Sample, off int64, at time.Time) []Chunk {
	if a.cfg.Format == Raw && a.m.RateHz == 0 {
		a.pending = append(a.pending, s)
		a.pendOff = append(a.pendOff, off)
		a.arrival = append(a.arrival, at)
		if len(a.pending) < inferSamples {
			return nil
		}
		return a.release()
	}
	return a.add(s, off, at, nil)
}

// release infers the rate from the pending samples and adds them.
func (a *Assembler) release() []Chunk {
	n := len(a.pending)
	if n == 0 {
		return nil
	}
	span := a.pending[n-1].TimeMS - a.pending[0].TimeMS
	rate := 100.0
	if n > 1 && span > 0 {
		rate = math.Round(float64(n-1)/span*1000*100) / 100
	}
	a.m.RateHz = math.Min(1000, math.Max(25, rate))
	var out []Chunk
	for i, s := range a.pending {
		out = a.add(s, a.pendOff[i], a.arrival[i], out)
	}
	a.pending, a.pendOff, a.arrival = nil, nil, nil
	return out
}

func (a *Assembler) add(s Sample, off int64, at time.Time, out []Chunk) []Chunk {
	m := &a.m
	atMS := float64(at.UnixNano()) / 1e6
	dev, gap := a.deviceTime(s, atMS)
	if gap {
		a.gaps++
		out = a.flush(out)
	}
	if a.cfg.Format == Summary || len(a.red) == 0 {
		// A message starts here. Its device time must be after the last
		// message's (the gateway keeps the first values at a device time)
		// and, for a live source, not after the arrival of its first
		// sample: a clock running fast (a device faster than its declared
		// rate, a board's crystal) is pulled back to the arrival time, so
		// device time never runs ahead of the gateway's clock. The pull
		// stays below a second between messages while the clocks agree
		// roughly, and the gateway's estimator goes on across it.
		start := math.Round(dev)
		if a.cfg.Live && !m.Absolute && start > atMS {
			start = math.Floor(atMS)
		}
		if a.started && start <= a.lastStart {
			start = a.lastStart + 1
		}
		if start != dev && !m.Absolute {
			m.AnchorMS += start - dev
			dev = start
		}
		a.lastStart, a.started = start, true
	}
	m.LastMS = dev
	m.Offset = off
	if a.cfg.Format == Summary {
		return append(out, Chunk{Msg: summaryMsg(s, dev), Samples: 1, Mark: *m})
	}
	if len(a.red) == 0 {
		a.startMS, a.firstAt, a.hasAmb = dev, at, s.HasAmbient
	}
	a.red = append(a.red, s.Red)
	a.ir = append(a.ir, s.IR)
	if a.hasAmb {
		a.amb = append(a.amb, s.Ambient)
	}
	a.endMark = *m
	if len(a.red) >= a.maxChunk() {
		out = a.flush(out)
	}
	return out
}

// deviceTime places sample s in device time, ms, and says whether a gap
// comes before it: a restarted device, a jump in the time column, or a live
// source that stalled.
func (a *Assembler) deviceTime(s Sample, atMS float64) (dev float64, gap bool) {
	m := &a.m
	period := 1000 / m.RateHz
	hasT := !math.IsNaN(s.TimeMS)
	switch {
	case !m.Started || s.Restart:
		if m.Started {
			gap = true
		}
		m.Started, m.K = true, 0
		m.Absolute = hasT && s.TimeMS >= absoluteMS
		switch {
		case m.Absolute:
			m.AnchorMS, m.OriginMS = 0, 0
		case a.cfg.Live || (gap && m.LastMS == 0):
			m.AnchorMS = atMS
		case gap:
			m.AnchorMS = m.LastMS + period // a restarted device in a recording: go on right after
		default:
			m.AnchorMS = a.cfg.AnchorMS
		}
		m.OriginMS = 0
		if hasT && !m.Absolute {
			m.OriginMS = s.TimeMS
		}
		if a.cfg.Format == Summary && !hasT && !a.cfg.Live {
			m.AnchorMS += period // a summary is stamped at the end of its second
		}
		dev = m.AnchorMS
		if hasT {
			dev = m.AnchorMS + s.TimeMS - m.OriginMS
		}
	case hasT:
		dev = m.AnchorMS + s.TimeMS - m.OriginMS
		if dev-m.LastMS > 2.5*period {
			gap = true
		}
	default:
		m.K++
		dev = m.AnchorMS + float64(m.K)*period
		if a.cfg.Live && atMS-dev > float64(LiveGapAfter.Milliseconds()) {
			m.AnchorMS, m.K, dev, gap = atMS, 0, atMS, true
		}
	}
	return dev, gap
}

func (a *Assembler) maxChunk() int {
	if a.cfg.MaxChunk > 0 {
		return a.cfg.MaxChunk
	}
	return int(math.Min(1000, math.Max(1, math.Round(a.m.RateHz))))
}

// Due reports whether the chunk being filled holds a sample that arrived
// before now-latency (a live source should send it).
func (a *Assembler) Due(now time.Time, latency time.Duration) bool {
	return len(a.red) > 0 && now.Sub(a.firstAt) >= latency
}

// Flush returns the chunk being filled (and, at the end of the input, any
// samples still waiting for the rate to be inferred).
func (a *Assembler) Flush(end bool) []Chunk {
	var out []Chunk
	if end && len(a.pending) > 0 {
		out = a.release()
	}
	return a.flush(out)
}

func (a *Assembler) flush(out []Chunk) []Chunk {
	if len(a.red) == 0 {
		return out
	}
	rc := &pb.RawChunk{DeviceTimeUnixMs: int64(math.Round(a.startMS)), SampleRateHz: a.m.RateHz,
		Red: a.red, Ir: a.ir}
	if a.hasAmb {
		rc.Ambient = a.amb
	}
	out = append(out, Chunk{Msg: &pb.ConnectRequest{Kind: &pb.ConnectRequest_RawChunk{RawChunk: rc}}, Samples: len(a.red), Mark: a.endMark})
	a.red, a.ir, a.amb = nil, nil, nil
	return out
}

func summaryMsg(s Sample, dev float64) *pb.ConnectRequest {
	sm := &pb.Summary{DeviceTimeUnixMs: int64(math.Round(dev))}
	opt := func(v float64) *float64 {
		if math.IsNaN(v) {
			return nil
		}
		return &v
	}
	sm.Spo2Pct, sm.PulseBpm, sm.PiPct, sm.Quality = opt(s.SpO2), opt(s.Pulse), opt(s.PI), opt(s.Q)
	return &pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: sm}}
}

// Mark returns the clock after the last sample added.
func (a *Assembler) Mark() Mark { return a.m }
