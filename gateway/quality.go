package gateway

import (
	"math"
	"sort"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/store"
)

// qualityWindow is how many recent seconds the SQI and PI distributions keep.
const qualityWindow = 3600

// quality accumulates a device's signal-quality figures in memory since the
// gateway started (counters that must survive restarts live in the cursor).
type quality struct {
	seconds     uint64 // trend points seen
	validSpO2   uint64
	clipping    uint64
	lowRes      uint64
	sqi, pi     ring // recent values for percentiles
	rateSamples uint64
	lastChunk   uint64 // samples in the newest chunk
	firstDevMS  int64
	lastDevMS   int64
	// clock drift: least squares of offset (device - gateway) against gateway time
	driftN               float64
	driftSx, driftSy     float64
	driftSxx, driftSxy   float64
	driftX0              float64
	reconnects, sessions uint64
}

func (q *quality) init() {
	q.sqi = newRing(qualityWindow)
	q.pi = newRing(qualityWindow)
}

// addPoint accounts one trend point.
func (q *quality) addPoint(p *store.Point) {
	q.seconds++
	if !math.IsNaN(p.SpO2) {
		q.validSpO2++
	}
	if estimator.Flags(p.Flags).Has(estimator.FlagClipping) {
		q.clipping++
	}
	if estimator.Flags(p.Flags).Has(estimator.FlagLowResolution) {
		q.lowRes++
	}
	if !math.IsNaN(p.SQI) {
		q.sqi.add(p.SQI)
	}
	if !math.IsNaN(p.PI) {
		q.pi.add(p.PI)
	}
}

// addClock accounts one (gateway time, device time) observation for drift.
func (q *quality) addClock(gatewayMS, deviceMS int64) {
	if q.driftN == 0 {
		q.driftX0 = float64(gatewayMS)
	}
	x := float64(gatewayMS) - q.driftX0
	y := float64(deviceMS - gatewayMS)
	q.driftN++
	q.driftSx += x
	q.driftSy += y
	q.driftSxx += x * x
	q.driftSxy += x * y
}

// driftPPM is the slope of device-minus-gateway offset over gateway time, in
// parts per million (positive: the device clock runs fast). NaN until the
// observations span at least a minute.
func (q *quality) driftPPM() float64 {
	n := q.driftN
	den := n*q.driftSxx - q.driftSx*q.driftSx
	if n < 10 || den <= 0 {
		return math.NaN()
	}
	if span := math.Sqrt(den) / n; span < 10_000 { // ~ std of x: too short a baseline
		return math.NaN()
	}
	return (n*q.driftSxy - q.driftSx*q.driftSy) / den * 1e6
}

// ring keeps the last n values.
type ring struct {
	v    []float64
	next int
	full bool
}

func newRing(n int) ring { return ring{v: make([]float64, 0, n)} }

func (r *ring) add(x float64) {
	if len(r.v) < cap(r.v) {
		r.v = append(r.v, x)
		return
	}
	r.v[r.next] = x
	r.next = (r.next + 1) % len(r.v)
}

// percentiles returns p10, p50, p90 of the kept values.
func (r *ring) percentiles() (n int, p10, p50, p90 float64) {
	if len(r.v) == 0 {
		return 0, math.NaN(), math.NaN(), math.NaN()
	}
	s := append([]float64(nil), r.v...)
	sort.Float64s(s)
	at := func(p float64) float64 { return s[int(math.Round(p*float64(len(s)-1)))] }
	return len(s), at(0.1), at(0.5), at(0.9)
}
