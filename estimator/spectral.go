package estimator

// The spectral ratio of ratios (RatioSpectral), computed over the window
// ring at the pulse frequency and its second harmonic.

import "math"

// spectralRatio is the ratio at the pulse frequency f0 (Hz) and its second
// harmonic over the samples in the window ring (RatioSpectral): with X_r and
// X_i the Hann-windowed discrete-time Fourier transforms of the band-passed
// channels at a harmonic, R = sum Re(X_r conj(X_i)) / sum |X_i|^2 x
// DC_i / DC_r. NaN without a pulse rate or before the ring holds two pulse
// periods. The sines and cosines come from rotations, one per sample.
func (s *Stream) spectralRatio(f0 float64) float64 {
	n := s.ringN
	if !(f0 > 0) || float64(n) < 2*s.rate/f0 {
		return math.NaN()
	}
	start := s.ringHead - n
	if start < 0 {
		start += len(s.ringFr)
	}
	// The band ends at 5 Hz, so every d-th sample (about 25 Hz) carries
	// the fundamental and second harmonic up to 300 /min; the band-pass's
	// low-pass keeps what folds onto them small.
	d := max(1, int(s.rate/25))
	var num, den, dcR, dcI float64
	for h := 1.0; h <= 2; h++ {
		w := 2 * math.Pi * h * f0 / s.rate * float64(d)
		if w >= math.Pi {
			break
		}
		cw, sw := math.Cos(w), math.Sin(w)
		hw := 2 * math.Pi / float64(n-1) * float64(d)
		ch, sh := math.Cos(hw), math.Sin(hw)
		c, si := 1.0, 0.0  // cos, sin of w k
		hc, hs := 1.0, 0.0 // cos, sin of hw k (Hann window)
		var rr, ri, ir, ii float64
		j := start
		for k := 0; k < n; k += d {
			win := 0.5 - 0.5*hc
			xr, xi := win*s.ringFr[j], win*s.ringFi[j]
			rr += xr * c
			ri -= xr * si
			ir += xi * c
			ii -= xi * si
			if h == 1 {
				dcR += s.ringR[j]
				dcI += s.ringI[j]
			}
			c, si = c*cw-si*sw, si*cw+c*sw
			hc, hs = hc*ch-hs*sh, hs*ch+hc*sh
			if j += d; j >= len(s.ringFr) {
				j -= len(s.ringFr)
			}
		}
		num += rr*ir + ri*ii
		den += ir*ir + ii*ii
	}
	if !(den > 0) || !(dcR > 0) || !(dcI > 0) {
		return math.NaN()
	}
	return num / den * dcI / dcR
}
