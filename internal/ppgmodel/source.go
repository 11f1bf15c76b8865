package ppgmodel

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// Relation says how the model turns a target saturation into the ratio of
// ratios R of the arterial pulse.
type Relation int

const (
	// RelationEmpirical uses the inverse of the common-practice line
	// SpO2 = 110 - 25 R, so an estimator with the empirical calibration reads
	// the target saturation. The zero value.
	RelationEmpirical Relation = iota
	// RelationBeerLambert uses the pure two-wavelength Beer-Lambert model with
	// the tabulated extinction coefficients at RedNM and IRNM.
	RelationBeerLambert
)

func (r Relation) String() string {
	switch r {
	case RelationEmpirical:
		return "empirical"
	case RelationBeerLambert:
		return "beer-lambert"
	}
	return fmt.Sprintf("Relation(%d)", int(r))
}

// Shape selects the two-Gaussian pulse shape parameters.
type Shape int

const (
	// ShapeExcellent is Tang et al. 2020, Table 1, "excellent": a sharp
	// systolic peak and a small diastolic wave. The zero value.
	ShapeExcellent Shape = iota
	// ShapeAcceptable is Tang et al. 2020, Table 1, "acceptable": a broader
	// systolic peak and a large diastolic wave.
	ShapeAcceptable
)

// Config fixes what does not change during a recording.
type Config struct {
	SampleRateHz float64  // samples per second per channel; required, 1..10000
	ADCBits      int      // converter resolution; 0 = unquantised output on a 0..1 full scale, else 4..24
	RedNM, IRNM  float64  // wavelengths, nm; 0 = 660 and 940. Used by RelationBeerLambert (650..950 nm)
	Relation     Relation // how the target SpO2 becomes R; zero = RelationEmpirical
	Seed         uint64   // the same seed, config and Vitals sequence give the same samples
	DCLevel      float64  // steady light level of both channels, fraction of full scale; 0 = 0.5 (mid-range), else (0, 1)
	NoiseRMS     float64  // white detector noise, fraction of DC (rms); 0 = 1e-4; negative = none
	Shape        Shape    // pulse shape; zero = ShapeExcellent
	HRV          float64  // beat-to-beat SD of the beat period, fraction (the beat amplitude varies by 1.5 x this); 0 = 0.02; negative = none
	// RatioFunc, when not nil, replaces Relation: it maps the target SpO2
	// (%, 0..100) to the ratio of ratios R (finite, > 0). Tests use it to
	// drive the model with a relation written independently of this
	// package's tables.
	RatioFunc func(spo2Pct float64) float64
}

func (c Config) withDefaults() Config {
	if c.RedNM == 0 {
		c.RedNM = 660
	}
	if c.IRNM == 0 {
		c.IRNM = 940
	}
	if c.DCLevel == 0 {
		c.DCLevel = 0.5
	}
	if c.NoiseRMS == 0 {
		c.NoiseRMS = 1e-4
	} else if c.NoiseRMS < 0 {
		c.NoiseRMS = 0
	}
	if c.HRV == 0 {
		c.HRV = 0.02
	} else if c.HRV < 0 {
		c.HRV = 0
	}
	return c
}

// Validate names the first field out of bounds.
func (c Config) Validate() error {
	switch {
	case !(c.SampleRateHz >= 1 && c.SampleRateHz <= 10000):
		return fmt.Errorf("SampleRateHz: %v, want 1..10000", c.SampleRateHz)
	case c.ADCBits != 0 && (c.ADCBits < 4 || c.ADCBits > 24):
		return fmt.Errorf("ADCBits: %d, want 0 (unquantised) or 4..24", c.ADCBits)
	case c.DCLevel < 0 || c.DCLevel >= 1:
		return fmt.Errorf("DCLevel: %v, want 0 (default 0.5) or in (0, 1)", c.DCLevel)
	case c.Relation != RelationEmpirical && c.Relation != RelationBeerLambert:
		return fmt.Errorf("Relation: %v, want empirical or beer-lambert", c.Relation)
	case c.Shape != ShapeExcellent && c.Shape != ShapeAcceptable:
		return fmt.Errorf("Shape: %d, want ShapeExcellent or ShapeAcceptable", c.Shape)
	}
	d := c.withDefaults()
	if _, err := NewTwoWavelength(d.RedNM, d.IRNM); err != nil && c.Relation == RelationBeerLambert {
		return fmt.Errorf("RedNM/IRNM: %w", err)
	}
	return nil
}

// Vitals is the physiology (and sensor condition) the caller wants generated
// now. Pass a new value to each Fill to follow a trajectory.
type Vitals struct {
	SpO2Pct       float64 // arterial saturation, %, 0..100 (clamped)
	PulseBPM      float64 // pulse rate, /min; 0 = no pulsation
	PIPct         float64 // infrared perfusion index (AC/DC x 100), %, 0..50 (clamped)
	RespRateBPM   float64 // breaths per minute of the baseline wander; 0 = no wander
	RespWanderPct float64 // amplitude of the respiratory baseline wander, % of DC
	MotionPct     float64 // motion artefact rms, % (absorbance x 100); 0 = still
	AmbientPct    float64 // room light reaching the detector, % of full scale (also written to the ambient channel)
	SensorOff     bool    // the finger is out: only room light, no pulse
}

// DefaultVitals is a resting adult with good perfusion.
func DefaultVitals() Vitals {
	return Vitals{SpO2Pct: 98, PulseBPM: 72, PIPct: 2, RespRateBPM: 15, RespWanderPct: 1}
}

// Truth is what the source generated in the last sample of the last Fill.
type Truth struct {
	Vitals
	Ratio   float64 // ratio of ratios of the arterial pulse
	Samples int64   // samples generated since New
	TimeS   float64 // Samples / SampleRateHz
}

// Source generates a two-wavelength PPG. Not safe for concurrent use.
type Source struct {
	cfg   Config
	fs    float64 // full scale, codes (1 when unquantised)
	quant bool
	tw    TwoWavelength
	rng   *rand.Rand
	shape *[shapeN + 1]float64

	// pulse
	phase, beatScale, beatAmp float64
	// respiration phasor
	rc, rs float64
	// motion resonator and its per-burst parameters
	inMotion           bool
	mb0, mb2, ma1, ma2 float64 // band-pass coefficients (b1 = 0)
	mz1, mz2           float64 // filter state (transposed direct form II)
	mNorm, mGain       float64

	truth Truth
}

// New returns a source; it panics if cfg does not validate (call
// cfg.Validate first to get an error instead).
func New(cfg Config) *Source {
	if err := cfg.Validate(); err != nil {
		panic("ppgmodel: " + err.Error())
	}
	cfg = cfg.withDefaults()
	s := &Source{cfg: cfg, fs: 1, rc: 1, beatScale: 1, beatAmp: 1}
	if cfg.ADCBits > 0 {
		s.fs = math.Ldexp(1, cfg.ADCBits)
		s.quant = true
	}
	s.tw, _ = NewTwoWavelength(cfg.RedNM, cfg.IRNM)
	s.rng = rand.New(rand.NewPCG(cfg.Seed, 0x9e3779b97f4a7c15))
	s.shape = &shapes[cfg.Shape]
	s.phase = s.rng.Float64()
	return s
}

// FullScale is the number of ADC codes (2^ADCBits), or 1 when unquantised.
func (s *Source) FullScale() float64 { return s.fs }

// Ratio is the ratio of ratios the model produces for a saturation, through
// the configured RatioFunc or Relation.
func (s *Source) Ratio(spo2Pct float64) float64 {
	spo2Pct = clamp(spo2Pct, 0, 100)
	if s.cfg.RatioFunc != nil {
		return s.cfg.RatioFunc(spo2Pct)
	}
	if s.cfg.Relation == RelationBeerLambert {
		return s.tw.Ratio(spo2Pct / 100)
	}
	return EmpiricalRatio(spo2Pct)
}

// Truth reports what was generated last.
func (s *Source) Truth() Truth { return s.truth }

// Fill writes len(red) samples of both channels (and of the ambient channel
// when ambient is not nil) with the physiology v. ir (and ambient, if given)
// must be at least as long as red. It does not allocate.
//
// Long because it is one pass of the per-sample loop (beat phase, respiration phasor, motion filter, quantisation) that BenchmarkFill measures allocation-free; per-sample helpers would pass that state through calls.
func (s *Source) Fill(red, ir, ambient []float64, v Vitals) {
	n := len(red)
	ir = ir[:n]
	if ambient != nil {
		ambient = ambient[:n]
	}
	rate := s.cfg.SampleRateHz
	v.SpO2Pct = clamp(v.SpO2Pct, 0, 100)
	v.PIPct = clamp(v.PIPct, 0, 50)
	ratio := s.Ratio(v.SpO2Pct)
	kIR := v.PIPct / 100
	kRed := ratio * kIR
	beatsPerSample := math.Max(v.PulseBPM, 0) / 60 / rate
	pulsing := beatsPerSample > 0 && !v.SensorOff

	// Respiration: rotate a unit phasor; renormalise once per call.
	wAmp := v.RespWanderPct / 100
	dr := 2 * math.Pi * math.Max(v.RespRateBPM, 0) / 60 / rate
	cd, sd := math.Cos(dr), math.Sin(dr)
	if h := math.Hypot(s.rc, s.rs); h > 0 {
		s.rc, s.rs = s.rc/h, s.rs/h
	}

	motion := v.MotionPct > 0 && !v.SensorOff
	if motion && !s.inMotion {
		s.startBurst()
	}
	s.inMotion = motion
	mAmp := v.MotionPct / 100 * s.mNorm

	dc := s.cfg.DCLevel * s.fs
	noise := s.cfg.NoiseRMS * dc
	amb := math.Max(v.AmbientPct, 0) / 100 * s.fs
	off := 0.005 * s.fs // room light with the finger out
	top := s.fs - 1
	shape := s.shape

	for j := 0; j < n; j++ {
		var z float64
		if pulsing {
			s.phase += beatsPerSample * s.beatScale
			if s.phase >= 1 {
				s.phase -= math.Floor(s.phase)
				s.newBeat()
			}
			x := s.phase * shapeN
			i := int(x)
			f := x - float64(i)
			z = (shape[i] + f*(shape[i+1]-shape[i])) * s.beatAmp
		}
		s.rc, s.rs = s.rc*cd-s.rs*sd, s.rc*sd+s.rs*cd
		var m float64
		if motion {
			e := s.rng.NormFloat64()
			y := s.mb0*e + s.mz1
			s.mz1 = -s.ma1*y + s.mz2
			s.mz2 = s.mb2*e - s.ma2*y
			m = mAmp * y
		}
		var r, i float64
		if v.SensorOff {
			r, i = off, off
		} else {
			base := dc * (1 + wAmp*s.rs)
			r = base * math.Exp(-kRed*z-s.mGain*m)
			i = base * math.Exp(-kIR*z-m)
		}
		if noise > 0 {
			r += noise * s.rng.NormFloat64()
			i += noise * s.rng.NormFloat64()
		}
		r += amb
		i += amb
		if s.quant {
			r = clamp(math.Floor(r+0.5), 0, top)
			i = clamp(math.Floor(i+0.5), 0, top)
		}
		red[j], ir[j] = r, i
		if ambient != nil {
			a := amb
			if s.quant {
				a = clamp(math.Floor(a+0.5), 0, top)
			}
			ambient[j] = a
		}
	}
	s.truth.Vitals = v
	s.truth.Ratio = ratio
	s.truth.Samples += int64(n)
	s.truth.TimeS = float64(s.truth.Samples) / rate
}

// newBeat draws the next beat's period jitter and amplitude.
func (s *Source) newBeat() {
	j := 1 + s.cfg.HRV*s.rng.NormFloat64()
	s.beatScale = 1 / clamp(j, 0.7, 1.3)
	s.beatAmp = clamp(1+1.5*s.cfg.HRV*s.rng.NormFloat64(), 0.8, 1.2)
}

// startBurst draws a motion burst's centre frequency and red/infrared gain
// and designs its resonator (RBJ band-pass, Q = 1), normalised to unit rms
// for unit white noise.
func (s *Source) startBurst() {
	f0 := 0.4 + 2.6*s.rng.Float64()
	if ny := s.cfg.SampleRateHz / 2; f0 > 0.8*ny {
		f0 = 0.8 * ny
	}
	s.mGain = 0.7 + 0.8*s.rng.Float64()
	w0 := 2 * math.Pi * f0 / s.cfg.SampleRateHz
	alpha := math.Sin(w0) / 2 // Q = 1
	a0 := 1 + alpha
	s.mb0, s.mb2 = alpha/a0, -alpha/a0
	s.ma1, s.ma2 = -2*math.Cos(w0)/a0, (1-alpha)/a0
	s.mz1, s.mz2 = 0, 0
	// Energy of the impulse response gives the output variance.
	var z1, z2, e float64
	x := 1.0
	for k := 0; k < 1<<16; k++ {
		y := s.mb0*x + z1
		z1 = -s.ma1*y + z2
		z2 = s.mb2*x - s.ma2*y
		x = 0
		e += y * y
		if k > 64 && y*y < 1e-14*e {
			break
		}
	}
	s.mNorm = 1 / math.Sqrt(e)
}

func clamp(x, lo, hi float64) float64 {
	if x < lo {
		return lo
	}
	if x > hi {
		return hi
	}
	return x
}

// shapeN is the resolution of the tabulated pulse shape over one beat.
const shapeN = 1024

// shapes holds each Shape tabulated over phase 0..1 (theta -pi..pi), one
// extra point for interpolation, normalised to 0..1.
var shapes [2][shapeN + 1]float64

// tangParams: Tang, Chen, Ward, Elgendi, Sci. Rep. 10, 13883 (2020), Table 1
// (docs/references.md, seen): a1, theta1, b1, a2, theta2, b2.
var tangParams = [2][6]float64{
	ShapeExcellent:  {1.0000, -1.5161, 0.6303, 0.1999, 0.8186, 1.0225},
	ShapeAcceptable: {0.7303, -1.5510, 0.7283, 0.5291, -0.2553, 1.2271},
}

// PulseShape evaluates the two-Gaussian pulse at beat phase theta
// (radians, -pi..pi), made periodic by adding the neighbouring beats' tails;
// not normalised.
func PulseShape(sh Shape, theta float64) float64 {
	p := tangParams[sh]
	z := 0.0
	for _, k := range [3]float64{-2 * math.Pi, 0, 2 * math.Pi} {
		for g := 0; g < 2; g++ {
			a, th, b := p[3*g], p[3*g+1], p[3*g+2]
			d := theta + k - th
			z += a * math.Exp(-d*d/(2*b*b))
		}
	}
	return z
}

func init() {
	for sh := range shapes {
		t := &shapes[sh]
		lo, hi := math.Inf(1), math.Inf(-1)
		for i := range t {
			t[i] = PulseShape(Shape(sh), -math.Pi+2*math.Pi*float64(i)/shapeN)
			lo, hi = math.Min(lo, t[i]), math.Max(hi, t[i])
		}
		for i := range t {
			t[i] = (t[i] - lo) / (hi - lo)
		}
	}
}
