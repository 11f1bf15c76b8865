package tune

import (
	"fmt"
	"math"
	"math/rand/v2"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// cohortOptions shape a generated cohort. Invented data (demo only, not
// physiology): it exists to exercise the sweep at scale and to check the
// direction of published findings, not their size.
type cohortOptions struct {
	Devices int
	Hours   float64
	Seed    uint64
	// DipsPerHour is the mean rate of desaturation dips per device.
	DipsPerHour float64
	// MissingPct is the share of samples with no SpO2 (isolated), plus
	// occasional dropouts of 5-60 s.
	MissingPct float64
}

// cohort generates 1 Hz SpO2 trends: each device has its own baseline
// (93-98 %), slow wander and measurement noise, quantised to whole percent
// as oximeters report; desaturation dips arrive as a Poisson process with
// varied depth (2-18 points below baseline) and duration (5-240 s, ramp
// down, hold, ramp up); some samples and short stretches are missing.
func cohort(o cohortOptions) []alarms.Trend {
	r := rand.New(rand.NewPCG(o.Seed, 0x5eed))
	n := int(o.Hours * 3600)
	out := make([]alarms.Trend, o.Devices)
	for d := range out {
		base := 93 + 5*r.Float64()
		s := make([]alarms.Sample, n)
		wander := 0.0
		dipLeft, dipLen, depth := 0, 0, 0.0
		drop := 0
		for i := range s {
			if dipLeft == 0 && r.Float64() < o.DipsPerHour/3600 {
				dipLen = 5 + int(235*math.Pow(r.Float64(), 2)) // more short dips than long ones
				dipLeft = dipLen
				depth = 2 + 16*r.Float64()
			}
			dip := 0.0
			if dipLeft > 0 {
				// Trapezoid: a fifth of the time down, three fifths held, a fifth up.
				k := float64(dipLen-dipLeft) / float64(dipLen)
				switch {
				case k < 0.2:
					dip = depth * k / 0.2
				case k > 0.8:
					dip = depth * (1 - k) / 0.2
				default:
					dip = depth
				}
				dipLeft--
			}
			wander += -0.002*wander + 0.05*r.NormFloat64()
			v := math.Round(base + wander - dip + 0.6*r.NormFloat64())
			v = math.Min(100, math.Max(60, v))
			smp := alarms.Sample{T: float64(i), SpO2: v, Pulse: math.Round(72 + 8*r.NormFloat64()), PI: 2, SQI: 0.9}
			if drop == 0 && r.Float64() < 1.0/7200 {
				drop = 5 + r.IntN(56)
			}
			if drop > 0 || r.Float64()*100 < o.MissingPct {
				smp.SpO2, smp.Pulse, smp.PI, smp.SQI = math.NaN(), math.NaN(), math.NaN(), math.NaN()
				if drop > 0 {
					drop--
				}
			}
			s[i] = smp
		}
		out[d] = alarms.Trend{Device: fmt.Sprintf("ward7-bed%03d", d+1), Samples: s}
	}
	return out
}
