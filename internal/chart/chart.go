package chart

import (
	"bytes"
	"encoding/xml"
	"math"
	"strconv"
)

// The Okabe-Ito colours, distinguishable with the common forms of colour
// blindness (Okabe & Ito, "Color Universal Design", 2008; common practice
// for scientific figures).
const (
	Blue          = "#0072B2"
	Orange        = "#E69F00"
	BluishGreen   = "#009E73"
	ReddishPurple = "#CC79A7"
	SkyBlue       = "#56B4E9"
	Vermillion    = "#D55E00"
	Yellow        = "#F0E442"
	Black         = "#000000"
)

// Palette is the order in which figures colour their series.
var Palette = []string{Blue, Orange, BluishGreen, ReddishPurple, SkyBlue, Vermillion, Yellow, Black}

// Color is the palette colour of series i, wrapping round.
func Color(i int) string { return Palette[i%len(Palette)] }

// Tick step families: a step is one of these times a power of ten.
var (
	Steps125  = []float64{1, 2, 5}
	Steps1225 = []float64{1, 2, 2.5, 5}
)

// Ticks returns round tick values covering [lo, hi] in about n intervals,
// the step being one of steps times a power of ten, and the range widened
// to the outer ticks. An empty range (hi <= lo) is widened by 1 each way.
func Ticks(lo, hi float64, n int, steps []float64) (ticks []float64, nlo, nhi float64) {
	if !(hi > lo) {
		lo, hi = lo-1, hi+1
	}
	raw := (hi - lo) / float64(n)
	p := math.Pow(10, math.Floor(math.Log10(raw)))
	step := 10 * p
	for _, m := range steps {
		if m*p >= raw {
			step = m * p
			break
		}
	}
	nlo = math.Floor(lo/step) * step
	nhi = math.Ceil(hi/step) * step
	for v := nlo; v <= nhi+step/2; v += step {
		ticks = append(ticks, math.Round(v/step)*step)
	}
	return ticks, nlo, nhi
}

// TickLabel prints a tick value with up to six significant digits, and
// negative zero as 0.
func TickLabel(v float64) string {
	s := strconv.FormatFloat(v, 'g', 6, 64)
	if s == "-0" {
		return "0"
	}
	return s
}

// Escape makes s safe as SVG (XML) text or attribute content.
func Escape(s string) string {
	var b bytes.Buffer
	_ = xml.EscapeText(&b, []byte(s))
	return b.String()
}
