package estimator

import "math"

// biquad is a second-order IIR section in transposed direct form II
// (coefficients from the RBJ audio-EQ cookbook, bilinear transform).
type biquad struct {
	b0, b1, b2, a1, a2 float64
	z1, z2             float64
}

func highPass(f0, rate, q float64) biquad {
	w := 2 * math.Pi * f0 / rate
	c, alpha := math.Cos(w), math.Sin(w)/(2*q)
	a0 := 1 + alpha
	return biquad{b0: (1 + c) / 2 / a0, b1: -(1 + c) / a0, b2: (1 + c) / 2 / a0, a1: -2 * c / a0, a2: (1 - alpha) / a0}
}

func lowPass(f0, rate, q float64) biquad {
	w := 2 * math.Pi * f0 / rate
	c, alpha := math.Cos(w), math.Sin(w)/(2*q)
	a0 := 1 + alpha
	return biquad{b0: (1 - c) / 2 / a0, b1: (1 - c) / a0, b2: (1 - c) / 2 / a0, a1: -2 * c / a0, a2: (1 - alpha) / a0}
}

func (f *biquad) step(x float64) float64 {
	y := f.b0*x + f.z1
	f.z1 = f.b1*x - f.a1*y + f.z2
	f.z2 = f.b2*x - f.a2*y
	return y
}

// settle puts the filter in the steady state for a constant input x, so a
// stream that starts (or restarts) at a large DC level does not ring. It
// returns the steady output.
func (f *biquad) settle(x float64) float64 {
	g := (f.b0 + f.b1 + f.b2) / (1 + f.a1 + f.a2)
	y := g * x
	f.z1 = y - f.b0*x
	f.z2 = f.b2*x - f.a2*y
	return y
}

// bandPass is the cardiac band: a 4th-order Butterworth high-pass (two
// sections) that rejects respiratory baseline wander and DC, and a
// 2nd-order Butterworth low-pass that rejects noise above the pulse
// harmonics that matter.
type bandPass struct{ hp1, hp2, lp biquad }

func newBandPass(lo, hi, rate float64) bandPass {
	// Butterworth 4th order as two sections: Q = 1/(2 cos(pi/8)), 1/(2 cos(3pi/8)).
	return bandPass{
		hp1: highPass(lo, rate, 0.5411961001461970),
		hp2: highPass(lo, rate, 1.3065629648763766),
		lp:  lowPass(hi, rate, math.Sqrt2/2),
	}
}

func (b *bandPass) step(x float64) float64 { return b.lp.step(b.hp2.step(b.hp1.step(x))) }

func (b *bandPass) settle(x float64) {
	y := b.hp1.settle(x)
	y = b.hp2.settle(y)
	b.lp.settle(y)
}

// stepPair steps two band-passes (red and infrared) by one sample each:
// the three sections of both channels written out in one function (no
// calls, which the compiler would not inline), the channels interleaved
// so the core overlaps their two independent dependency chains. Same
// arithmetic, in the same order per channel, as a.step(x), b.step(y)
// (TestStepPairMatchesStep).
func stepPair(a, b *bandPass, x, y float64) (float64, float64) {
	f, g := &a.hp1, &b.hp1
	u := f.b0*x + f.z1
	v := g.b0*y + g.z1
	f.z1 = f.b1*x - f.a1*u + f.z2
	g.z1 = g.b1*y - g.a1*v + g.z2
	f.z2 = f.b2*x - f.a2*u
	g.z2 = g.b2*y - g.a2*v
	x, y = u, v
	f, g = &a.hp2, &b.hp2
	u = f.b0*x + f.z1
	v = g.b0*y + g.z1
	f.z1 = f.b1*x - f.a1*u + f.z2
	g.z1 = g.b1*y - g.a1*v + g.z2
	f.z2 = f.b2*x - f.a2*u
	g.z2 = g.b2*y - g.a2*v
	x, y = u, v
	f, g = &a.lp, &b.lp
	u = f.b0*x + f.z1
	v = g.b0*y + g.z1
	f.z1 = f.b1*x - f.a1*u + f.z2
	g.z1 = g.b1*y - g.a1*v + g.z2
	f.z2 = f.b2*x - f.a2*u
	g.z2 = g.b2*y - g.a2*v
	return u, v
}
