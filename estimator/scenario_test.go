package estimator

import (
	"math"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/ppgmodel"
)

// level is one plateau of a scripted scenario; the vitals ramp linearly
// from the previous plateau over rampS and then hold.
type level struct {
	spo2, pulse, pi float64
	motion          float64 // motion artefact rms, % (0 = still)
	off             bool    // sensor off
}

type scenario struct {
	rate      float64
	bits      int
	relation  ppgmodel.Relation
	relFunc   func(spo2Pct float64) float64 // when set, drives the model instead of relation
	plateauS  float64
	rampS     float64
	levels    []level
	seed      uint64
	chunk     int
	shape     ppgmodel.Shape
	window    float64
	cal       Calibration
	respPct   float64 // respiratory wander, % of DC
	noiseFrac float64 // 0 = model default
	ratio     RatioMethod
}

// scored is one emitted second with the truth at its end.
type scored struct {
	est      Estimate
	truth    ppgmodel.Truth
	plateau  int     // index of the level
	intoS    float64 // seconds since the plateau started (at the end of this second)
	settledS float64 // seconds since the vitals stopped changing
}

func (sc scenario) run(t testing.TB) []scored {
	t.Helper()
	src := ppgmodel.New(ppgmodel.Config{SampleRateHz: sc.rate, ADCBits: sc.bits, Relation: sc.relation, RatioFunc: sc.relFunc, Seed: sc.seed, Shape: sc.shape, NoiseRMS: sc.noiseFrac})
	cal := sc.cal
	if cal == nil {
		cal = Empirical()
	}
	st, err := New(Config{SampleRateHz: sc.rate, ADCBits: sc.bits, Calibration: cal, AveragingS: sc.window, Ratio: sc.ratio})
	if err != nil {
		t.Fatal(err)
	}
	chunk := sc.chunk
	if chunk == 0 {
		chunk = 25
	}
	red := make([]float64, chunk)
	ir := make([]float64, chunk)
	var out []Estimate
	var res []scored
	total := int64(sc.plateauS * sc.rate * float64(len(sc.levels)))
	prev := sc.levels[0]
	resp := sc.respPct
	for n := int64(0); n < total; n += int64(chunk) {
		tS := float64(n) / sc.rate
		p := int(tS / sc.plateauS)
		into := tS - float64(p)*sc.plateauS
		cur := sc.levels[p]
		if p > 0 {
			prev = sc.levels[p-1]
		}
		f := 1.0
		if p > 0 && into < sc.rampS {
			f = into / sc.rampS
		}
		// Respiration drifts between 12 and 20 /min.
		v := ppgmodel.Vitals{
			SpO2Pct:       prev.spo2 + f*(cur.spo2-prev.spo2),
			PulseBPM:      prev.pulse + f*(cur.pulse-prev.pulse),
			PIPct:         prev.pi * math.Pow(cur.pi/prev.pi, f),
			RespRateBPM:   16 + 4*math.Sin(2*math.Pi*tS/97),
			RespWanderPct: resp,
			MotionPct:     cur.motion,
			SensorOff:     cur.off,
		}
		src.Fill(red, ir, nil, v)
		out = st.Push(red, ir, nil, out[:0])
		for _, e := range out {
			endS := float64(e.Second + 1)
			pe := int((endS - 1e-9) / sc.plateauS)
			intoE := endS - float64(pe)*sc.plateauS
			settled := intoE
			if pe > 0 {
				settled = intoE - sc.rampS
			}
			res = append(res, scored{est: e, truth: src.Truth(), plateau: pe, intoS: intoE, settledS: settled})
		}
	}
	return res
}

// accuracy is what the acceptance criteria measure over the settled seconds.
type accuracy struct {
	seconds, spo2N, pulseN  int
	armsPct, biasPct, sdPct float64
	pulseMAE                float64
	reportShare             float64
	lowResShare             float64
}

// score evaluates seconds at least settleS after the vitals stopped changing
// (and skips still plateaus' motion handling: every level is scored).
func score(res []scored, settleS float64) accuracy {
	var a accuracy
	var d []float64
	var sumAbsP float64
	lowRes := 0
	for _, r := range res {
		if r.settledS < settleS {
			continue
		}
		a.seconds++
		if r.est.Flags.Has(FlagLowResolution) {
			lowRes++
		}
		if !math.IsNaN(r.est.SpO2Pct) {
			d = append(d, r.est.SpO2Pct-r.truth.SpO2Pct)
		}
		if !math.IsNaN(r.est.PulseBPM) {
			a.pulseN++
			sumAbsP += math.Abs(r.est.PulseBPM - r.truth.PulseBPM)
		}
	}
	a.spo2N = len(d)
	a.armsPct, a.biasPct, a.sdPct = armsBiasSD(d)
	a.pulseMAE = sumAbsP / float64(a.pulseN)
	a.reportShare = float64(a.spo2N) / float64(a.seconds)
	a.lowResShare = float64(lowRes) / float64(a.seconds)
	return a
}

// armsBiasSD is the accuracy root-mean-square of ISO 80601-2-61,
// Arms = sqrt(mean(d^2)), with bias = mean(d) and SD the population standard
// deviation, so that Arms^2 = bias^2 + SD^2 (docs/references.md, "Accuracy
// standards": the definition seen in secondary sources, the identity is algebra).
func armsBiasSD(d []float64) (arms, bias, sd float64) {
	if len(d) == 0 {
		return math.NaN(), math.NaN(), math.NaN()
	}
	var s, ss float64
	for _, x := range d {
		s += x
		ss += x * x
	}
	n := float64(len(d))
	bias = s / n
	arms = math.Sqrt(ss / n)
	var v float64
	for _, x := range d {
		v += (x - bias) * (x - bias)
	}
	return arms, bias, math.Sqrt(v / n)
}

// desaturation is the acceptance scenario: about 99 % down to 70 % and back
// in 60 s plateaus, pulse 60-120 /min, infrared PI 0.6-4 %.
func desaturation() []level {
	spo2 := []float64{99, 94, 88, 82, 76, 70, 76, 82, 88, 94, 99}
	pulse := []float64{60, 75, 90, 105, 120, 110, 95, 80, 65, 100, 70}
	pi := []float64{2, 0.6, 4, 1, 3, 0.8, 1.5, 0.6, 2.5, 4, 1.2}
	l := make([]level, len(spo2))
	for i := range spo2 {
		l[i] = level{spo2: spo2[i], pulse: pulse[i], pi: pi[i]}
	}
	return l
}

func motionBursts(seedOffset int) []level {
	var l []level
	spo2 := []float64{98, 92, 85, 78, 72, 96, 88, 80}
	pi := []float64{2, 0.8, 3, 1, 0.6, 4, 1.5, 2}
	mot := []float64{0.5, 1, 2, 4, 0.3, 3, 1.5, 6}
	for i := range spo2 {
		l = append(l, level{spo2: spo2[i], pulse: 70 + 5*float64(i), pi: pi[i]})
		l = append(l, level{spo2: spo2[i], pulse: 70 + 5*float64(i), pi: pi[i], motion: mot[(i+seedOffset)%len(mot)]})
	}
	return l
}

// motion reports what happened in the seconds of the motion plateaus.
type motionScore struct {
	seconds, flagged, withheld, confident, confidentWrong int
}

func scoreMotion(sc scenario, res []scored) motionScore {
	var m motionScore
	for _, r := range res {
		if sc.levels[r.plateau].motion == 0 {
			continue
		}
		m.seconds++
		e := r.est
		if e.Flags.Has(FlagMotion) {
			m.flagged++
		}
		if math.IsNaN(e.SpO2Pct) {
			m.withheld++
			continue
		}
		if e.SQI >= 0.5 {
			m.confident++
			if math.Abs(e.SpO2Pct-r.truth.SpO2Pct) > 6 {
				m.confidentWrong++
			}
		}
	}
	return m
}
