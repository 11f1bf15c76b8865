package ingest

import (
	"math"
	"time"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Signal quality and uptime accounting.
//
// Every figure of FleetService.GetDeviceQuality comes from one of three places:
//   - the device's cursor (chunks accepted, lost, duplicate, late, rejected),
//     which is persisted with every batch and survives restarts;
//   - the stored sessions (uptime over 1 h, 24 h and 7 d);
//   - the in-memory accumulators below (since the gateway started): shares of
//     valid, clipped and low-resolution seconds, SQI and PI distributions,
//     clock drift and the effective sample rate of the current session.
//
// The accumulators are small and fixed in size (about 5 KiB per device): no
// per-second history is kept in memory.

// Distribution histograms: SQI in 0.01 steps over 0..1; PI in log steps of
// 25 per decade over 0.01..100 %. A distribution covers the last 30 to 60
// minutes of trend time (two halves that rotate every 30 minutes).
const (
	histBins        = 100
	histHalfMS      = 30 * 60 * 1000
	piMinPct        = 0.01
	piBinsPerDecade = 25
)

// Clock drift: the least-delayed message of each 30 s window of gateway time
// gives one (gateway time, device - gateway offset) observation; the drift is
// the least-squares slope over the last hour of such windows. Taking the
// least-delayed message per window (as time-transfer protocols do) makes the
// estimate immune to queueing delay, resent backlogs and late messages.
const (
	clockWindowMS = 30_000
	clockWindows  = 120 // one hour
	// clockMinSpanMS is the shortest baseline for a drift estimate.
	clockMinSpanMS = 5 * 60 * 1000
	// clockRefWindows is how many recent windows define the reference
	// offset for late messages.
	clockRefWindows = 10
)

// ValidWindow is how many recent trend seconds the valid-SpO2 gauge covers.
const ValidWindow = 300

// quality accumulates a device's signal-quality figures in memory. Caller
// holds the device's lock for every method.
type quality struct {
	seconds   uint64 // trend points seen since the gateway started
	validSpO2 uint64
	clipping  uint64
	lowRes    uint64
	recent    bitRing // validity of the last ValidWindow trend points
	sqi, pi   halves

	// effective sample rate over the current session (device time)
	rateSamples uint64 // raw samples since the session began
	lastChunk   uint64 // samples in the newest chunk
	firstDevMS  int64  // device time of the session's first raw chunk (0 = none yet)
	lastDevMS   int64  // device time of the newest raw chunk

	clock clockEst
}

// startSession resets what is measured per session (sessions and reconnects
// themselves are counted in the stored device description).
func (q *quality) startSession() {
	q.rateSamples, q.lastChunk, q.firstDevMS, q.lastDevMS = 0, 0, 0, 0
}

// addChunk accounts one accepted data message received at gatewayMS with
// device time deviceMS and the given number of raw samples (0 for a
// summary). It reports whether the message is late: more than lateAfter
// behind what the device clock reads now, as estimated from the recent
// least-delayed messages (so clock offset and drift do not count as delay).
func (q *quality) addChunk(gatewayMS, deviceMS int64, samples uint32, lateAfter time.Duration) (late bool) {
	q.clock.add(gatewayMS, deviceMS)
	if ref, ok := q.clock.refOffset(); ok {
		late = ref-(deviceMS-gatewayMS) > lateAfter.Milliseconds()
	}
	if samples > 0 {
		if q.firstDevMS == 0 {
			q.firstDevMS = deviceMS
		}
		q.rateSamples += uint64(samples)
		q.lastDevMS = deviceMS
		q.lastChunk = uint64(samples)
	}
	return late
}

// effectiveRateHz is the raw samples received per second of device time in
// the current (or last) session: the samples of every chunk but the newest,
// over the device time from the first chunk's start to the newest chunk's
// start. Lost chunks lower it; NaN before two chunks.
func (q *quality) effectiveRateHz() float64 {
	span := q.lastDevMS - q.firstDevMS
	if q.firstDevMS == 0 || span <= 0 {
		return math.NaN()
	}
	return float64(q.rateSamples-q.lastChunk) / (float64(span) / 1000)
}

// addPoint accounts one trend point.
func (q *quality) addPoint(p *store.Point) {
	q.seconds++
	valid := !math.IsNaN(p.SpO2)
	if valid {
		q.validSpO2++
	}
	q.recent.push(valid)
	if estimator.Flags(p.Flags).Has(estimator.FlagClipping) {
		q.clipping++
	}
	if estimator.Flags(p.Flags).Has(estimator.FlagLowResolution) {
		q.lowRes++
	}
	if !math.IsNaN(p.SQI) {
		q.sqi.add(p.TimeMS, sqiBin(p.SQI))
	}
	if !math.IsNaN(p.PI) {
		q.pi.add(p.TimeMS, piBin(p.PI))
	}
}

// driftPPM is the device clock's drift against the gateway clock in parts
// per million (positive: the device clock runs fast); NaN until the
// observations span clockMinSpanMS.
func (q *quality) driftPPM() float64 { return q.clock.driftPPM() }

// recentValidShare is the share of the last ValidWindow trend points with a
// valid SpO2; NaN before the first point.
func (q *quality) recentValidShare() float64 { return q.recent.share() }

// bitRing remembers the last ValidWindow booleans.
type bitRing struct {
	bits [(ValidWindow + 63) / 64]uint64
	n    int // values held, up to ValidWindow
	next int
	ones int
}

func (r *bitRing) push(v bool) {
	w, b := r.next/64, uint(r.next%64)
	if r.n == ValidWindow {
		if r.bits[w]&(1<<b) != 0 {
			r.ones--
		}
	} else {
		r.n++
	}
	if v {
		r.bits[w] |= 1 << b
		r.ones++
	} else {
		r.bits[w] &^= 1 << b
	}
	r.next = (r.next + 1) % ValidWindow
}

func (r *bitRing) share() float64 {
	if r.n == 0 {
		return math.NaN()
	}
	return float64(r.ones) / float64(r.n)
}

// halves is a histogram over the last 30 to 60 minutes of trend time: the
// current half-hour and the one before.
type halves struct {
	cur, prev   [histBins]uint32
	epoch       int64 // half-hour index of cur
	started     bool
	curN, prevN uint32
}

func (h *halves) add(tMS int64, bin int) {
	e := tMS / histHalfMS
	switch {
	case !h.started:
		h.epoch, h.started = e, true
	case e == h.epoch+1:
		h.prev, h.prevN = h.cur, h.curN
		h.cur, h.curN, h.epoch = [histBins]uint32{}, 0, e
	case e > h.epoch+1:
		h.prev, h.prevN = [histBins]uint32{}, 0
		h.cur, h.curN, h.epoch = [histBins]uint32{}, 0, e
	case e == h.epoch-1:
		h.prev[bin]++
		h.prevN++
		return
	case e < h.epoch-1:
		return // older than the distribution covers (a resent backlog)
	}
	h.cur[bin]++
	h.curN++
}

// quantiles returns the count and the p10, p50 and p90 bin positions
// (fractional bin index, interpolated linearly inside a bin).
func (h *halves) quantiles() (n uint64, q [3]float64) {
	n = uint64(h.curN) + uint64(h.prevN)
	if n == 0 {
		return 0, [3]float64{math.NaN(), math.NaN(), math.NaN()}
	}
	for i, p := range []float64{0.1, 0.5, 0.9} {
		target := p * float64(n)
		var cum float64
		for b := 0; b < histBins; b++ {
			c := float64(h.cur[b]) + float64(h.prev[b])
			if c == 0 {
				continue
			}
			if cum+c >= target {
				q[i] = float64(b) + (target-cum)/c
				break
			}
			cum += c
		}
	}
	return n, q
}

func sqiBin(v float64) int {
	return min(histBins-1, max(0, int(v*histBins)))
}

// sqiValue maps a fractional bin position back to an SQI.
func sqiValue(pos float64) float64 { return pos / histBins }

func piBin(pct float64) int {
	if pct <= piMinPct {
		return 0
	}
	return min(histBins-1, int(math.Log10(pct/piMinPct)*piBinsPerDecade))
}

// piValue maps a fractional bin position back to a PI in percent.
func piValue(pos float64) float64 { return piMinPct * math.Pow(10, pos/piBinsPerDecade) }

// clockEst keeps the least-delayed (largest device-minus-gateway offset)
// message of each window of gateway time.
type clockEst struct {
	win   [clockWindows]clockObs // closed windows, a ring
	n     int                    // closed windows held
	next  int
	cur   clockObs // the open window
	curOK bool
}

type clockObs struct {
	gwMS int64 // gateway time of the least-delayed message
	off  int64 // its device minus gateway time, ms
}

func (c *clockEst) add(gwMS, devMS int64) {
	o := clockObs{gwMS: gwMS, off: devMS - gwMS}
	idx, curIdx := gwMS/clockWindowMS, c.cur.gwMS/clockWindowMS
	switch {
	case !c.curOK:
		c.cur, c.curOK = o, true
	case idx > curIdx:
		c.win[c.next] = c.cur
		c.next = (c.next + 1) % clockWindows
		c.n = min(c.n+1, clockWindows)
		c.cur = o
	case idx == curIdx && o.off > c.cur.off:
		c.cur = o
	}
}

// each calls fn for the held observations, newest first, the open window included.
func (c *clockEst) each(fn func(clockObs) bool) {
	if !c.curOK {
		return
	}
	if !fn(c.cur) {
		return
	}
	for i := 1; i <= c.n; i++ {
		if !fn(c.win[(c.next-i+clockWindows)%clockWindows]) {
			return
		}
	}
}

// refOffset is the device-minus-gateway offset of the least-delayed message
// among the last clockRefWindows windows.
func (c *clockEst) refOffset() (int64, bool) {
	best, k := int64(math.MinInt64), 0
	c.each(func(o clockObs) bool {
		best = max(best, o.off)
		k++
		return k < clockRefWindows
	})
	return best, k > 0
}

func (c *clockEst) driftPPM() float64 {
	var n, sx, sy float64
	var x0 int64
	first := true
	var xs, ys [clockWindows + 1]float64
	c.each(func(o clockObs) bool {
		if first {
			x0, first = o.gwMS, false
		}
		xs[int(n)], ys[int(n)] = float64(o.gwMS-x0), float64(o.off)
		sx += xs[int(n)]
		sy += ys[int(n)]
		n++
		return true
	})
	if n < 5 {
		return math.NaN()
	}
	mx, my := sx/n, sy/n
	var sxx, sxy, lo, hi float64
	for i := 0; i < int(n); i++ {
		dx := xs[i] - mx
		sxx += dx * dx
		sxy += dx * (ys[i] - my)
		lo, hi = math.Min(lo, xs[i]), math.Max(hi, xs[i])
	}
	if hi-lo < clockMinSpanMS || sxx == 0 {
		return math.NaN()
	}
	return sxy / sxx * 1e6
}

// RefreshDeviceSeries brings the per-device gauges up to date with every
// known device (the gateway calls it before /metrics is served, so a scrape
// sees the current figures, including devices restored from the store that
// have not reconnected). A device without a stream and silent for longer
// than the trend retention (Config.TrendDays, when set) has its series
// deleted: its history is gone too.
func (p *Pipeline) RefreshDeviceSeries() {
	var cutoff int64 = math.MinInt64
	if days := p.cfg.TrendDays; days > 0 {
		cutoff = p.nowMS() - int64(days)*24*3600*1000
	}
	for _, d := range p.devices.all() {
		d.mu.Lock()
		connected, valid, drift := d.stream != nil, d.q.recentValidShare(), d.q.driftPPM()
		battery := math.NaN()
		if d.desc.BatteryPct >= 0 {
			battery = d.desc.BatteryPct / 100
		}
		idle := !connected && max(d.cur.LastSeenMS, d.desc.LastSeenMS) < cutoff
		d.mu.Unlock()
		if idle {
			p.m.deleteDevice(d.id)
			continue
		}
		p.m.deviceSeries(d.id, connected, valid, drift, battery)
	}
}
