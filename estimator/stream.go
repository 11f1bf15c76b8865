package estimator

import (
	"fmt"
	"math"
	"slices"

	"github.com/pulsefleet/pulsefleet/internal/stats"
)

// Estimate is one second of a stream.
type Estimate struct {
	// Second is the index of the one-second window since the stream started
	// or was Reset: window k covers samples [ceil(k*rate), ceil((k+1)*rate)).
	Second int64
	// SpO2Pct is the saturation, %; PulseBPM the pulse rate, /min; PIPct the
	// perfusion index of the second (infrared) channel, AC/DC x 100; Ratio the
	// ratio of ratios. NaN = withheld (no valid value).
	SpO2Pct, PulseBPM, PIPct, Ratio float64
	// SQI is the signal quality, 0 (nothing usable) .. 1 (clean, steady
	// pulse filling the window); never NaN.
	SQI   float64
	Flags Flags
}

// Tuning of the algorithm (see doc.go for what each step does).
const (
	lowCutHz        = 0.5  // cardiac band, lower edge (30 /min)
	highCutHz       = 5.0  // cardiac band, upper edge (300 /min)
	minPeriodS      = 0.2  // refractory period: no two beats closer (300 /min)
	maxPeriodS      = 2.0  // a longer interval is a missed beat or no pulse (30 /min)
	envelopeTauS    = 1.5  // decay of the amplitude envelope that sets the hysteresis
	hysteresis      = 0.5  // fraction of the envelope a swing must exceed to count
	dcTauS          = 0.5  // DC tracker for discontinuity detection
	jumpFraction    = 0.25 // a step of this fraction of DC restarts the filters
	historyBeats    = 9    // recent beats that define "consistent"
	periodTolerance = 0.3  // a beat's period within +-30 % of the recent median
	ampTolerance    = 2.0  // a beat's PI within a factor 2 of the recent median
	minRho          = 0.95 // red/infrared correlation a beat needs for the ratio
	minBeats        = 3    // beats a value needs in the window
	minCoverage     = 0.3  // share of the window those beats must span for the ratio
	sensorOffFrac   = 0.02 // DC below this fraction of full scale: no finger
	motionSwing     = 2.5  // a second's swing this many times the recent PI: motion
	motionSQICap    = 0.4  // SQI ceiling in a second with motion
	minSQIForRatio  = 0.3  // below this the ratio and SpO2 are withheld
	periodDevOK     = 0.05 // beat period spread (mean |deviation| / median) that costs no quality
	periodDevSpan   = 0.10 // ... and how much more takes quality to 0
	ampDevOK        = 0.10 // same for the beat amplitude (PI)
	ampDevSpan      = 0.20
	beatMargin      = 4    // ring slots beyond the most beats a window can hold
	warmUpS         = 1.5  // beats ending this soon after a (re)start are filter transients
	maxAbsSample    = 1e12 // larger magnitudes (and NaN, Inf) are not samples
)

// sums accumulates one beat's samples.
type sums struct {
	n             float64
	sr, si        float64 // band-passed red, infrared
	srr, sii, sri float64
	dcr, dci      float64 // raw (ambient-subtracted) levels
	clipped       float64
	// first differences of the band-passed red and infrared (RatioDerivativeSlope)
	dr, di, dri, dii float64
}

func (a *sums) sub(b *sums) {
	a.n -= b.n
	a.sr -= b.sr
	a.si -= b.si
	a.srr -= b.srr
	a.sii -= b.sii
	a.sri -= b.sri
	a.dcr -= b.dcr
	a.dci -= b.dci
	a.clipped -= b.clipped
	a.dr -= b.dr
	a.di -= b.di
	a.dri -= b.dri
	a.dii -= b.dii
}

type beat struct {
	end            int64   // sample index of the foot that ended it
	period         float64 // s
	ratio, rho, pi float64
	num, den       float64 // the ratio's regression sums, AC normalised by DC: ratio = num/den
	acRed, acIR    float64 // codes
	okRate         bool    // plausible and consistent: counts for pulse rate and PI
	okRatio        bool    // also well correlated and unclipped: counts for R
}

// second accumulates the current one-second window.
type second struct {
	n, sumR, sumI       float64
	clipped             int
	loR, hiR, loI, hiI  float64 // band-passed extremes
	motion, discontinue bool
}

func (s *second) reset() {
	*s = second{loR: math.Inf(1), hiR: math.Inf(-1), loI: math.Inf(1), hiI: math.Inf(-1)}
}

// Stream estimates one device's SpO2, pulse rate, perfusion index and signal
// quality from its raw two-channel samples. It is not safe for concurrent
// use; give each device its own Stream.
type Stream struct {
	cfg  Config
	cal  Calibration
	rate float64
	fs   float64 // full scale in codes; 0 = unknown

	winSamples, minPeriod, maxPeriod int64
	envDecay, dcAlpha                float64

	red, ir    bandPass
	derivative bool // Config.Ratio == RatioDerivativeSlope
	// RatioSpectral: the window's band-passed and raw samples, oldest at
	// ringHead once full (ringN == len).
	ringFr, ringFi, ringR, ringI []float64
	ringHead, ringN              int
	lastFr, lastFi               float64 // previous band-passed samples, for first differences
	started                      bool
	dcR, dcI                     float64

	// beat detector on y = -(band-passed infrared): systolic peaks up
	env               float64
	seekMax           bool
	minY, maxY        float64
	minIdx            int64
	prevY             float64 // y of the previous sample
	minPrevY          float64 // y just before the current minimum
	minNextY          float64 // y just after it (NaN until seen)
	footT             float64 // sub-sample time of the last foot, samples
	haveFoot          bool
	footIdx           int64
	footY, beatPeak   float64
	acc, snap         sums
	hist              [historyBeats]beat // recent detected beats, for consistency
	histN, histHead   int
	beats             []beat // window ring: sized for the averaging window at 300 /min
	beatHead, beatN   int
	lastRateBeat      int64
	scratch, scratch2 []float64
	scratch3          []float64

	warmUntil int64 // beats closing before this sample are filter transients
	n         int64 // samples since start
	sec       int64 // current second
	nextSec   int64 // sample count that completes it
	cur       second
}

// New returns a stream for cfg, or an error naming the bad field.
func New(cfg Config) (*Stream, error) {
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("estimator: %w", err)
	}
	s := &Stream{cfg: cfg, cal: cfg.Calibration, rate: cfg.SampleRateHz}
	if s.cal == nil {
		s.cal = Empirical()
	}
	if cfg.AveragingS == 0 {
		s.cfg.AveragingS = DefaultAveragingS
	}
	if cfg.Ratio == "" {
		s.cfg.Ratio = RatioBeatSlope
	}
	s.derivative = s.cfg.Ratio == RatioDerivativeSlope
	if s.cfg.Ratio == RatioSpectral {
		w := int(math.Round(s.cfg.AveragingS * s.rate))
		s.ringFr, s.ringFi, s.ringR, s.ringI = make([]float64, w), make([]float64, w), make([]float64, w), make([]float64, w)
	}
	if cfg.ADCBits > 0 {
		s.fs = math.Ldexp(1, cfg.ADCBits)
	}
	s.winSamples = int64(math.Round(s.cfg.AveragingS * s.rate))
	// Beats are at least minPeriodS apart, so a window holds at most this many.
	nb := int(math.Ceil(s.cfg.AveragingS/minPeriodS)) + beatMargin
	s.beats = make([]beat, nb)
	s.scratch, s.scratch2, s.scratch3 = make([]float64, nb), make([]float64, nb), make([]float64, nb)
	s.minPeriod = int64(math.Ceil(minPeriodS * s.rate))
	s.maxPeriod = int64(math.Floor(maxPeriodS * s.rate))
	s.envDecay = math.Exp(-1 / (envelopeTauS * s.rate))
	s.dcAlpha = 1 - math.Exp(-1/(dcTauS*s.rate))
	s.Reset()
	return s, nil
}

// Config returns the configuration with defaults filled in.
func (s *Stream) Config() Config { c := s.cfg; c.Calibration = s.cal; return c }

// Reset forgets the signal (after a gap or a reconnect): filters, beats and
// the averaging window start over and Second counts from 0 again.
func (s *Stream) Reset() {
	s.red = newBandPass(lowCutHz, highCutHz, s.rate)
	s.ir = newBandPass(lowCutHz, highCutHz, s.rate)
	s.started = false
	s.restartDetector()
	s.beatN, s.beatHead = 0, 0
	s.histN, s.histHead = 0, 0
	s.lastRateBeat = math.MinInt64 / 2
	s.n, s.sec = 0, 0
	s.nextSec = s.boundary(0)
	s.cur.reset()
}

func (s *Stream) boundary(k int64) int64 {
	return int64(math.Ceil(float64(k+1)*s.rate - 1e-9))
}

func (s *Stream) restartDetector() {
	s.env = 0
	s.seekMax = false
	s.minY, s.maxY = math.Inf(1), math.Inf(-1)
	s.haveFoot = false
	s.prevY = math.NaN()
	s.beatPeak = math.Inf(-1)
	s.acc, s.snap = sums{}, sums{}
}

// Push feeds one chunk of samples (ADC codes, or any linear light measure
// when ADCBits is 0). red and ir are the first and second channel;
// min(len(red), len(ir)) samples are used. ambient, when not nil and at least
// as long, is subtracted from both channels first. Push appends any completed
// one-second estimates to out and returns it; it does not allocate when out
// has capacity.
func (s *Stream) Push(red, ir, ambient []float64, out []Estimate) []Estimate {
	n := min(len(red), len(ir))
	red, ir = red[:n], ir[:n]
	useAmb := ambient != nil && len(ambient) >= n
	for j := range red {
		r, i := red[j], ir[j]
		if s.fs > 0 && (r <= 0 || i <= 0 || r >= s.fs-1 || i >= s.fs-1) {
			s.cur.clipped++
			s.acc.clipped++
		}
		if useAmb {
			r -= ambient[j]
			i -= ambient[j]
		}
		if !(math.Abs(r) <= maxAbsSample && math.Abs(i) <= maxAbsSample) {
			// Not a measurement (NaN, infinite, absurd): hold the level so
			// the filters survive, and keep the beat out of the ratio.
			r, i = s.dcR, s.dcI
			s.acc.clipped++
		}
		s.sample(r, i)
		if s.n == s.nextSec {
			out = append(out, s.emit())
		}
	}
	return out
}

// sample processes one ambient-subtracted sample pair.
func (s *Stream) sample(r, i float64) {
	if !s.started || math.Abs(r-s.dcR) > jumpFraction*math.Abs(s.dcR) || math.Abs(i-s.dcI) > jumpFraction*math.Abs(s.dcI) {
		// Start, or a step (sensor off/on, a knock): restart the filters at
		// the new level so they do not ring, and start averaging over.
		if s.started {
			s.cur.discontinue = true
		}
		s.started = true
		s.red.settle(r)
		s.ir.settle(i)
		s.lastFr, s.lastFi = 0, 0 // the settled band-pass output
		s.ringHead, s.ringN = 0, 0
		s.dcR, s.dcI = r, i
		s.restartDetector()
		s.beatN, s.histN, s.histHead = 0, 0, 0
		s.warmUntil = s.n + int64(warmUpS*s.rate)
	}
	s.dcR += s.dcAlpha * (r - s.dcR)
	s.dcI += s.dcAlpha * (i - s.dcI)
	fr, fi := stepPair(&s.red, &s.ir, r, i)

	c := &s.cur
	c.n++
	c.sumR += r
	c.sumI += i
	// Plain comparisons, not math.Min/Max (calls): fr and fi are finite
	// (Push replaces what is not), so the result is the same.
	if fr < c.loR {
		c.loR = fr
	}
	if fr > c.hiR {
		c.hiR = fr
	}
	if fi < c.loI {
		c.loI = fi
	}
	if fi > c.hiI {
		c.hiI = fi
	}

	s.detect(-fi)
	s.prevY = -fi

	a := &s.acc
	a.n++
	a.sr += fr
	a.si += fi
	a.srr += fr * fr
	a.sii += fi * fi
	a.sri += fr * fi
	a.dcr += r
	a.dci += i
	dr, di := fr-s.lastFr, fi-s.lastFi
	a.dr += dr
	a.di += di
	a.dri += dr * di
	a.dii += di * di
	s.lastFr, s.lastFi = fr, fi
	if s.ringFr != nil {
		s.ringFr[s.ringHead], s.ringFi[s.ringHead], s.ringR[s.ringHead], s.ringI[s.ringHead] = fr, fi, r, i
		if s.ringHead++; s.ringHead == len(s.ringFr) { // not %: a division per sample
			s.ringHead = 0
		}
		if s.ringN < len(s.ringFr) {
			s.ringN++
		}
	}
	s.n++
}

// detect runs the foot/peak state machine on y (systolic peaks up) for
// sample s.n, before that sample is added to acc.
func (s *Stream) detect(y float64) {
	s.env *= s.envDecay
	if a := math.Abs(y); a > s.env {
		s.env = a
	}
	h := hysteresis * s.env
	if !s.seekMax {
		if y < s.minY {
			s.minY, s.minIdx = y, s.n
			s.minPrevY, s.minNextY = s.prevY, math.NaN()
			s.snap = s.acc
			return
		}
		if s.n == s.minIdx+1 {
			s.minNextY = y
		}
		if y > s.minY+h {
			s.foot()
			s.seekMax = true
			s.maxY = y
		}
		return
	}
	if y > s.maxY {
		s.maxY = y
	} else if y < s.maxY-h {
		s.beatPeak = math.Max(s.beatPeak, s.maxY)
		s.seekMax = false
		s.minY, s.minIdx = y, s.n
		s.minPrevY, s.minNextY = s.prevY, math.NaN()
		s.snap = s.acc
	}
}

// footTime refines the foot at minIdx to a fraction of a sample with a
// parabola through it and its neighbours, so the beat period is not
// quantised to whole samples (one sample is 2 /min at 60 /min and 30 Hz).
func (s *Stream) footTime() float64 {
	t := float64(s.minIdx)
	a, b, c := s.minPrevY, s.minY, s.minNextY
	if d := a - 2*b + c; d > 0 && !math.IsNaN(d) {
		t += math.Max(-0.5, math.Min(0.5, 0.5*(a-c)/d))
	}
	return t
}

// foot handles a confirmed foot at s.minIdx: it closes the beat that began
// at the previous foot.
func (s *Stream) foot() {
	if s.haveFoot && s.minIdx-s.footIdx < s.minPeriod {
		return // within the refractory period: part of the same beat
	}
	ft := s.footTime()
	if s.haveFoot {
		s.closeBeat(&s.snap, s.minIdx-s.footIdx, (ft-s.footT)/s.rate)
	}
	s.acc.sub(&s.snap)
	s.haveFoot = true
	s.footIdx = s.minIdx
	s.footT = ft
	s.footY = s.minY
	s.beatPeak = math.Inf(-1)
}

func (s *Stream) closeBeat(a *sums, samples int64, periodS float64) {
	if s.minIdx < s.warmUntil {
		return
	}
	b := beat{end: s.minIdx, period: periodS}
	n := a.n
	dcR, dcI := a.dcr/n, a.dci/n
	cri := a.sri - a.sr*a.si/n
	cii := a.sii - a.si*a.si/n
	crr := a.srr - a.sr*a.sr/n
	slope := cri / cii
	b.rho = cri / math.Sqrt(crr*cii)
	b.num, b.den = cri/(dcR*dcI), cii/(dcI*dcI)
	if s.derivative {
		b.num, b.den = (a.dri-a.dr*a.di/n)/(dcR*dcI), (a.dii-a.di*a.di/n)/(dcI*dcI)
	}
	b.ratio = b.num / b.den
	b.acIR = s.beatPeak - s.footY
	b.acRed = math.Abs(slope) * b.acIR
	b.pi = b.acIR / dcI * 100

	plausible := samples >= s.minPeriod && samples <= s.maxPeriod && b.acIR > 0 && dcI > 0 && dcR > 0 && !math.IsInf(b.acIR, 0)
	consistent := true
	if plausible && s.histN >= 3 {
		mp := s.histMedian(func(h *beat) float64 { return h.period })
		mpi := s.histMedian(func(h *beat) float64 { return h.pi })
		if math.Abs(b.period-mp) > periodTolerance*mp || b.pi > ampTolerance*mpi || b.pi < mpi/ampTolerance {
			consistent = false
			s.cur.motion = true
		}
	}
	b.okRate = plausible && consistent
	b.okRatio = b.okRate && b.rho >= minRho && a.clipped == 0 && b.ratio > 0 && !math.IsNaN(b.ratio)
	if b.okRate && !b.okRatio && b.rho < minRho && (s.fs == 0 || math.Min(b.acIR, b.acRed) >= MinResolvedCodes) {
		// A well-resolved beat whose channels disagree: something other
		// than the arterial pulse moves the light.
		s.cur.motion = true
	}
	if plausible {
		s.hist[s.histHead] = b
		s.histHead = (s.histHead + 1) % historyBeats
		s.histN = min(s.histN+1, historyBeats)
	}
	if b.okRate {
		s.lastRateBeat = b.end
	}
	s.beats[s.beatHead] = b
	s.beatHead = (s.beatHead + 1) % len(s.beats)
	s.beatN = min(s.beatN+1, len(s.beats))
}

// histMedian is the upper median of f over the history (the middle value,
// the higher of the two for an even count: always a value that occurred).
func (s *Stream) histMedian(f func(*beat) float64) float64 {
	v := s.scratch2[:0]
	for k := 0; k < s.histN; k++ {
		v = append(v, f(&s.hist[k]))
	}
	slices.Sort(v)
	return v[len(v)/2]
}

// levelFlags flags what the second's light levels show: the sensor off
// (off; nothing else is estimated then), clipping, a step in the level, or
// too few converter codes resolved.
func (s *Stream) levelFlags(c *second, dcR, dcI float64) (f Flags, off bool) {
	if dcR <= 0 || dcI <= 0 || (s.fs > 0 && (dcR < sensorOffFrac*s.fs || dcI < sensorOffFrac*s.fs)) {
		return FlagSensorOff | FlagNoPulse, true
	}
	if c.clipped > 0 {
		f |= FlagClipping
	}
	if c.discontinue {
		f |= FlagMotion // a step in the light level with the sensor on
	}
	if s.fs > 0 && math.Min(c.hiR-c.loR, c.hiI-c.loI) < MinResolvedCodes {
		f |= FlagLowResolution
	}
	return f, false
}

// emit closes the current second.
func (s *Stream) emit() Estimate {
	c := &s.cur
	e := Estimate{Second: s.sec, SpO2Pct: math.NaN(), PulseBPM: math.NaN(), PIPct: math.NaN(), Ratio: math.NaN()}
	s.sec++
	s.nextSec = s.boundary(s.sec)
	defer c.reset()

	dcR, dcI := c.sumR/c.n, c.sumI/c.n
	flags, off := s.levelFlags(c, dcR, dcI)
	e.Flags |= flags
	if off {
		return e
	}

	// Beats that ended inside the window.
	from := s.n - s.winSamples
	periods, rs := s.scratch[:0], s.scratch2[:0]
	pis := s.scratch3
	np := 0
	var cover, quality, minAC float64
	minAC = math.Inf(1)
	for k := 0; k < s.beatN; k++ {
		b := &s.beats[(s.beatHead-1-k+2*len(s.beats))%len(s.beats)]
		if b.end <= from {
			break
		}
		if !b.okRate {
			continue
		}
		periods = append(periods, b.period)
		pis[np] = b.pi
		np++
		if b.okRatio {
			rs = append(rs, b.ratio)
			cover += b.period
			quality += clamp01((b.rho - 0.9) / 0.08)
			minAC = math.Min(minAC, math.Min(b.acIR, b.acRed))
		}
	}
	window := s.cfg.AveragingS
	gap := float64(s.n-s.lastRateBeat) / s.rate
	if len(periods) < 2 || gap > math.Max(3, 2.5*stats.Median(periods)) {
		e.Flags |= FlagNoPulse
		return e
	}
	pi := stats.Median(pis[:np])
	e.PIPct = pi
	// Regularity: a pulse repeats; motion and noise do not.
	devP, devA := relDev(periods), relDev(pis[:np])
	regularity := clamp01(1-(devP-periodDevOK)/periodDevSpan) * clamp01(1-(devA-ampDevOK)/ampDevSpan)
	if devP > periodDevOK+periodDevSpan/2 || devA > ampDevOK+ampDevSpan/2 {
		c.motion = true
	}
	if c.motion || (c.hiI-c.loI)/dcI*100 > motionSwing*pi {
		e.Flags |= FlagMotion
	}
	if len(periods) >= minBeats {
		e.PulseBPM = 60 / interquartileMean(periods)
	}
	if len(rs) >= minBeats && cover >= minCoverage*window && !(s.fs > 0 && minAC < MinUsableCodes) {
		e.SQI = math.Min(1, cover/window) * quality / float64(len(rs)) * regularity
		if e.Flags&FlagMotion != 0 {
			e.SQI = math.Min(e.SQI, motionSQICap)
		}
		if e.SQI >= minSQIForRatio {
			e.Ratio = interquartileMean(rs)
			if s.ringFr != nil {
				e.Ratio = s.spectralRatio(e.PulseBPM / 60)
			}
			if v, ok := s.cal.SpO2(e.Ratio); ok {
				e.SpO2Pct = v
			}
		}
	}
	return e
}

func clamp01(x float64) float64 { return math.Max(0, math.Min(1, x)) }

// interquartileMean sorts v in place and averages its middle half (all of
// it below four values): robust to a few outlying beats, smoother than the
// median.
func interquartileMean(v []float64) float64 {
	slices.Sort(v)
	n := len(v)
	lo, hi := 0, n
	if n >= 4 {
		lo, hi = n/4, n-n/4
	}
	sum := 0.0
	for _, x := range v[lo:hi] {
		sum += x
	}
	return sum / float64(hi-lo)
}

// relDev is the mean absolute deviation from the median, relative to the
// median: a robust coefficient of variation. It sorts v.
func relDev(v []float64) float64 {
	if len(v) < 2 {
		return math.NaN()
	}
	m := stats.Median(v)
	d := 0.0
	for _, x := range v {
		d += math.Abs(x - m)
	}
	return d / float64(len(v)) / math.Abs(m)
}
