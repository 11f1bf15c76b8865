// Package ppgmodel is a physical model of a two-wavelength photoplethysmogram
// (PPG) as a pulse oximeter's photodetector sees it. It is used by the
// estimator's tests, the fleet simulator and the demo.
//
// The model, per wavelength λ (red and infrared):
//
//		I_λ(t) = DC_λ · (1 + w(t)) · exp(−k_λ·z(t) − g_λ·m(t)) + ambient + noise
//
//	  - z(t) in [0, 1] is the pulse shape: a sum of two Gaussians over the beat
//	    phase θ in [−π, π) (Tang, Chen, Ward, Elgendi, Sci. Rep. 10, 13883 (2020),
//	    Table 1, "excellent" and "acceptable" parameter sets), made periodic and
//	    normalised to [0, 1]. The beat period follows the pulse rate with a small
//	    beat-to-beat jitter (heart-rate variability).
//	  - k_ir = PI/100, so the infrared perfusion index (AC/DC × 100) is PI, and
//	    k_red = R·k_ir, so the ratio of ratios of the arterial pulse is R
//	    (Beer-Lambert: the change of absorbance is proportional to the extinction
//	    of the blood at each wavelength).
//	  - R comes from the target saturation through a [Relation]: either the
//	    inverse of the common-practice empirical line SpO2 = 110 − 25 R
//	    ([RelationEmpirical], the default) or the pure two-wavelength
//	    Beer-Lambert model with the tabulated extinction coefficients at the
//	    configured wavelengths ([RelationBeerLambert]). Score an estimator with
//	    the calibration that matches the relation the model was driven by.
//	  - w(t) is respiratory baseline wander, a sinusoid at the respiratory rate.
//	  - m(t) is a motion artefact: band-limited random noise (a resonator with a
//	    random centre frequency of 0.4-3 Hz per burst), entering the infrared
//	    absorbance with gain 1 and the red with a random gain per burst
//	    (0.7-1.5), so motion pulls the measured ratio away from the arterial one.
//	  - Sensor off: the detector sees only room light (0.5 % of full scale) and
//	    noise, no pulse.
//	  - The result is quantised to ADC codes 0 .. 2^bits − 1 (clipped at both
//	    ends); with ADCBits 0 the output is unquantised on a 0..1 full scale.
//
// The source is deterministic from its seed and allocation-free in the
// steady state: [Source.Fill] writes into caller-provided buffers. The caller
// changes the physiology at any time by passing a different [Vitals] to the
// next Fill; [Source.Truth] reports what was generated last, for scoring.
//
// Caveats: the model ignores scattering (real sensors read higher SpO2 at the
// same R than the pure Beer-Lambert model says), venous pulsation, and LED
// and detector temperature drift. It is a test signal, not a physiology
// simulator.
package ppgmodel
