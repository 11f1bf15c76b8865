package estimator

import "strings"

// Flags say why a value was withheld or should be trusted less. Several may
// be set at once.
type Flags uint16

const (
	// FlagNoPulse: no plausible beat in the last few seconds.
	FlagNoPulse Flags = 1 << iota
	// FlagSensorOff: the light level is too low for a finger to be in place
	// (below 2 % of full scale when the ADC resolution is known; no light at
	// all otherwise).
	FlagSensorOff
	// FlagClipping: a sample in this second sat at the converter's limits.
	FlagClipping
	// FlagMotion: beats or the signal swing in this second do not look like
	// the recent pulse (amplitude, period or red/infrared correlation).
	FlagMotion
	// FlagLowResolution: the pulsatile swing spans fewer than
	// MinResolvedCodes ADC codes on one channel, too few for two significant
	// digits of AC.
	FlagLowResolution
	// FlagAnchoring: SpO2 is withheld because the calibration maps the
	// anchored ratio R/R0 and the device's room-air anchor R0 is not
	// complete yet (Anchor).
	FlagAnchoring
)

var flagNames = [...]string{"no_pulse", "sensor_off", "clipping", "motion", "low_resolution", "anchoring"}

// String lists the set flags joined by "|", e.g. "no_pulse|motion"; "" when
// none.
func (f Flags) String() string {
	if f == 0 {
		return ""
	}
	var b strings.Builder
	for i, name := range flagNames {
		if f&(1<<i) != 0 {
			if b.Len() > 0 {
				b.WriteByte('|')
			}
			b.WriteString(name)
		}
	}
	if rest := f &^ (1<<len(flagNames) - 1); rest != 0 {
		if b.Len() > 0 {
			b.WriteByte('|')
		}
		b.WriteString("unknown")
	}
	return b.String()
}

// Has reports whether all of g are set in f.
func (f Flags) Has(g Flags) bool { return f&g == g }
