package ingest

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// The drift estimator takes each window's least-delayed message, so queueing
// delay and a resent backlog do not bend the line. Clocks are made up for the
// test; crystal clocks drift by tens of ppm (from memory, as an order of
// magnitude only).
func TestClockDriftIgnoresDelayAndBacklog(t *testing.T) {
	for _, ppm := range []float64{-80, 0, 25, 400} {
		var c clockEst
		rng := rand.New(rand.NewPCG(1, uint64(ppm+1000)))
		g0 := int64(1_700_000_000_000) / clockWindowMS * clockWindowMS // quick messages start each window
		for k := 0; k < 720; k++ {                                     // one message every 5 s for an hour
			sent := g0 + int64(k)*5000
			dev := sent + 1500 + int64(math.Round(float64(sent-g0)*ppm/1e6))
			delay := int64(20)
			if k%6 != 0 { // five of six messages queue up to 3 s
				delay += rng.Int64N(3000)
			}
			if k == 400 { // a backlog of 50 old messages arrives at once
				for b := 0; b < 50; b++ {
					c.add(sent+delay, dev-int64(300_000-b*5000))
				}
			}
			c.add(sent+delay, dev)
		}
		got := c.driftPPM()
		if math.Abs(got-ppm) > 0.5 {
			t.Errorf("drift %v ppm estimated as %.3f", ppm, got)
		}
	}
	var short clockEst
	for k := 0; k < 20; k++ { // 100 s: too short a baseline
		short.add(int64(k)*5000, int64(k)*5000)
	}
	if v := short.driftPPM(); !math.IsNaN(v) {
		t.Errorf("drift from 100 s of observations: %v, want none (NaN)", v)
	}
}

// Percentiles come from fixed histograms: SQI in 0.01 steps, PI in 25 log
// steps per decade (each about 9.6 % wide).
func TestDistributionsFromHistograms(t *testing.T) {
	var q quality
	base := int64(1_700_000_000_000) / histHalfMS * histHalfMS
	for i := 0; i < 1000; i++ {
		// SQI uniform over 0..1 in 0.001 steps; PI log-uniform over 0.1..10 %.
		q.addPoint(&store.Point{TimeMS: base + int64(i)*1000, SpO2: math.NaN(), SQI: float64(i) / 1000,
			PI: 0.1 * math.Pow(100, float64(i)/1000)})
	}
	n, pos := q.sqi.quantiles()
	if n != 1000 {
		t.Fatalf("count %d, want 1000", n)
	}
	for i, want := range []float64{0.1, 0.5, 0.9} {
		if got := sqiValue(pos[i]); math.Abs(got-want) > 0.011 {
			t.Errorf("SQI quantile %d: %.4f, want %.2f", i, got, want)
		}
	}
	_, pos = q.pi.quantiles()
	for i, want := range []float64{0.1 * math.Pow(100, 0.1), 1, 0.1 * math.Pow(100, 0.9)} {
		if got := piValue(pos[i]); math.Abs(got/want-1) > 0.1 {
			t.Errorf("PI quantile %d: %.4f, want %.4f", i, got, want)
		}
	}
	// An hour later the old half-hours have rotated out.
	q.addPoint(&store.Point{TimeMS: base + 2*histHalfMS + 1, SpO2: 97, SQI: 0.42, PI: 3})
	if n, pos := q.sqi.quantiles(); n != 1 || math.Abs(sqiValue(pos[1])-0.42) > 0.011 {
		t.Errorf("after an hour: n=%d p50=%.3f, want only the new value 0.42", n, sqiValue(pos[1]))
	}
	if share := float64(q.validSpO2) / float64(q.seconds); math.Abs(share-1.0/1001) > 1e-12 {
		t.Errorf("valid share %v", share)
	}
}

func TestRecentValidShareCoversTheLast300Seconds(t *testing.T) {
	var r bitRing
	for i := 0; i < 1000; i++ {
		r.push(i < 800) // the last 200 are invalid
	}
	if got := r.share(); math.Abs(got-100.0/300) > 1e-12 {
		t.Errorf("share %v, want 100/300", got)
	}
}
