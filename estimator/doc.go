// Package estimator turns a pulse oximeter's raw two-channel
// photoplethysmogram (red and infrared by default; any two wavelengths) into
// one estimate per second: SpO2, pulse rate, perfusion index, a signal
// quality index (SQI, 0..1), the ratio of ratios, and flags saying why a
// value was withheld or deserves less trust. It is pure: no I/O, no clock
// (time is the sample count), no allocation per sample.
//
// # Algorithm, per Stream (one per device)
//
//  1. Ambient light, when given, is subtracted from both channels.
//  2. A step of more than 25 % of the DC level (sensor off or on, a knock)
//     restarts the filters at the new level and the averaging window; beats
//     ending in the first 1.5 s after a (re)start are filter transients and
//     are dropped, so the first values come after about 3 s.
//  3. Cardiac band: each channel goes through a 4th-order Butterworth
//     high-pass at 0.5 Hz, which removes DC and rejects respiratory baseline
//     wander (0.1-0.4 Hz, attenuated 16x or more), and a 2nd-order low-pass
//     at 5 Hz (band 30-300 /min).
//  4. Beats: on the band-passed infrared (inverted, so systole points up) a
//     hysteresis detector finds feet (minima) and peaks; a swing must exceed
//     half of a decaying amplitude envelope to count, which ignores the
//     dicrotic wave and noise, and feet closer than 0.2 s (the refractory
//     period) belong to the same beat. Feet are refined to a fraction of a
//     sample with a parabola.
//  5. Per beat (foot to foot): DC per channel is the mean level; the
//     infrared AC is the foot-to-peak swing; the red/infrared slope comes from
//     a least-squares fit of the band-passed red on the band-passed infrared
//     over the whole beat, which uses every sample, not just two extremes
//     (the ratio as a regression slope; docs/references.md "Ratio
//     methods"). With Config.Ratio = RatioDerivativeSlope the slope is
//     that of the first differences of the band-passed channels instead (a
//     derivative-based ratio): the systolic upstroke weighs most and slow
//     components the channels do not share weigh less; noisier at low
//     perfusion. With RatioSpectral the ratio's value is the cross-spectrum
//     of the Hann-windowed band-passed channels over the averaging window
//     at the pulse rate and its second harmonic over the infrared power
//     there (the ratio at the pulse frequency; the beats still decide
//     whether there is a value). On the synthetic stepped desaturation
//     Arms is 0.16 % (slope), 0.06 % (derivative), 0.05 % (spectral); on the
//     camera recordings the derivative transfers best across people
//     (README "Calibrating prototypes").
//     The ratio of ratios is R = slope x DC_ir / DC_red, the perfusion index
//     PI = AC_ir / DC_ir x 100, and rho is the red/infrared correlation.
//  6. A beat counts for pulse rate and PI when its period is 0.2-2 s and,
//     once nine beats are known, within 30 % of their median period with a PI
//     within a factor 2 of their median. It counts for R when also rho >= 0.95
//     and no sample was clipped.
//  7. Each second, over the averaging window (default 8 s, Config.AveragingS):
//     pulse rate = 60 / interquartile mean of the beat periods; PI = median;
//     R = interquartile mean of the beat ratios; SpO2 = Calibration(R).
//     SQI = coverage (share of the window spanned by beats that count for R)
//     x correlation quality (rho from 0.9 to 0.98 maps to 0..1) x regularity
//     (spread of beat periods beyond 5 % and of PI beyond 10 % lowers it),
//     capped at 0.4 in a second with motion.
//
// # When values are withheld (NaN)
//
//   - everything but SQI (0): sensor off (DC below 2 % of full scale, or no
//     light at all when ADCBits is 0), or no pulse (fewer than two beats in
//     the window, or none for max(3 s, 2.5 periods));
//   - pulse rate: fewer than 3 beats in the window;
//   - R and SpO2: fewer than 3 beats that count for R, or they span less
//     than 30 % of the window, or the smaller channel's AC is under 10 ADC
//     codes (MinUsableCodes), or SQI < 0.3;
//   - SpO2 alone: the calibration has no value for R (outside its range).
//
// # Flags
//
// FlagSensorOff, FlagNoPulse as above; FlagClipping when a sample of the
// second sat at 0 or full scale; FlagMotion when the light level stepped by
// more than 25 % (with the sensor on), or a beat in the second broke
// the consistency rules, or a well-resolved beat's channels disagree (rho <
// 0.95 with both swings >= 100 codes), or the second's infrared swing exceeds
// 2.5 x the median PI, or the window's beats are irregular (period spread >
// 10 %, PI spread > 20 %); FlagLowResolution when the band-passed swing of
// either channel in the second spans fewer than MinResolvedCodes (100) codes,
// i.e. too few for two significant digits of AC (docs/references.md: AC about 2 %
// of DC near mid-range needs >= 14 bits; common practice). FlagAnchoring
// is set by an Anchor, not by the Stream: SpO2 is withheld because the
// calibration maps the anchored ratio R/R0 and the room-air anchor R0 is not
// complete yet.
//
// # Room-air anchor
//
// A calibration may map R/R0 instead of R (AnchoredInput; a curve file with
// input: anchored_ratio), R0 the median of a device's usable per-second
// ratios over the first seconds of a wear, the person at rest on room air.
// Config.Validate refuses such a calibration, so a Stream never applies it
// to R; an Anchor applies it to the Timeline's estimates instead, keyed on
// device time so that it carries across Timeline restarts.
//
// # Caveats
//
//   - Estimates lag the physiology by about half the averaging window plus
//     about 0.5 s of filter and detector delay; a shorter window follows
//     faster and is noisier.
//   - The consistency and regularity rules treat an irregular rhythm (atrial
//     fibrillation, frequent ectopics) like motion: SQI drops and SpO2 may be
//     withheld even though the signal is real.
//   - Motion whose red/infrared ratio happens to equal the arterial one is
//     indistinguishable from pulse by the ratio; it is caught only by
//     irregularity. Periodic motion at a steady rate (tapping, walking) can
//     pass as pulse.
//   - The beer-lambert calibration ignores scattering and reads low on real
//     sensors; use a fitted curve for a real device.
//   - Second k covers samples [ceil(k*rate), ceil((k+1)*rate)) after New or
//     Reset; a partial last second is not emitted until it completes.
package estimator
