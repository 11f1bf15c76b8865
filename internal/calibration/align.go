package calibration

import (
	"fmt"
	"math"
	"slices"
	"sort"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/stats"
)

// DeviceSecond is one second of a prototype's output as the estimator
// reports it.
type DeviceSecond struct {
	// Second indexes the one-second window since the recording started.
	Second int64
	// Ratio is the ratio of ratios; NaN when the estimator withheld it.
	Ratio float64
	// SQI is the signal quality 0..1.
	SQI float64
}

// ReferenceSecond is one reference reading on the same clock as the
// device seconds.
type ReferenceSecond struct {
	Second  int64
	SpO2Pct float64 // NaN when the reference had no valid reading
}

// AlignOptions say what counts as a stable stretch. Zero values take the
// defaults named on each field.
type AlignOptions struct {
	// WindowS is the length of a pairing window in seconds; each window
	// that passes the checks gives one pair. 0 = 30 s (plateau-length
	// pairing, common practice).
	WindowS int
	// MaxReferenceSpreadPct is the largest max-min range of the reference
	// SpO2 within a window, in % SpO2; 0 = 2 %. A wider range means the
	// saturation was moving and device and reference may disagree only by
	// their different delays.
	MaxReferenceSpreadPct float64
	// MinReferenceFraction is the share of a window's seconds that need a
	// reference reading; 0 = 0.8.
	MinReferenceFraction float64
	// MinSQI is the signal quality a device second needs to count; 0 = 0.5.
	MinSQI float64
	// MinValidFraction is the share of a window's seconds that need a ratio
	// with SQI >= MinSQI; 0 = 0.5.
	MinValidFraction float64
	// ReferenceLagS shifts the reference: device second k is compared with
	// reference second k + ReferenceLagS. 0 = no shift; negative allowed.
	ReferenceLagS int
	// Subject is written into every pair; optional.
	Subject string
	// QualityWeights makes each pair's ratio the SQI-weighted median of the
	// window's good seconds and sets its Weight to the window's mean SQI
	// times the share of its seconds that were good, so that the fit leans
	// on the windows the device measured best. false = plain median,
	// unweighted.
	QualityWeights bool
}

func (o AlignOptions) withDefaults() (AlignOptions, error) {
	if o.WindowS == 0 {
		o.WindowS = 30
	}
	if o.MaxReferenceSpreadPct == 0 {
		o.MaxReferenceSpreadPct = 2
	}
	if o.MinReferenceFraction == 0 {
		o.MinReferenceFraction = 0.8
	}
	if o.MinSQI == 0 {
		o.MinSQI = 0.5
	}
	if o.MinValidFraction == 0 {
		o.MinValidFraction = 0.5
	}
	switch {
	case o.WindowS < 1 || o.WindowS > 600:
		return o, fmt.Errorf("WindowS: %d s, want 1..600", o.WindowS)
	case !(o.MaxReferenceSpreadPct > 0 && o.MaxReferenceSpreadPct <= 100):
		return o, fmt.Errorf("MaxReferenceSpreadPct: %v %%, want (0, 100]", o.MaxReferenceSpreadPct)
	case !(o.MinReferenceFraction > 0 && o.MinReferenceFraction <= 1):
		return o, fmt.Errorf("MinReferenceFraction: %v, want (0, 1]", o.MinReferenceFraction)
	case !(o.MinSQI > 0 && o.MinSQI <= 1):
		return o, fmt.Errorf("MinSQI: %v, want (0, 1]", o.MinSQI)
	case !(o.MinValidFraction > 0 && o.MinValidFraction <= 1):
		return o, fmt.Errorf("MinValidFraction: %v, want (0, 1]", o.MinValidFraction)
	}
	return o, nil
}

// AlignReport counts the windows and why each dropped one was dropped;
// every window is counted once, under the first check it failed.
type AlignReport struct {
	Windows int // windows examined
	Kept    int // pairs produced
	// NoReference: fewer than MinReferenceFraction of the seconds had a
	// reference reading.
	NoReference int
	// ReferenceUnstable: the reference moved more than MaxReferenceSpreadPct.
	ReferenceUnstable int
	// LowQuality: fewer than MinValidFraction of the seconds had a ratio
	// with SQI >= MinSQI.
	LowQuality int
	// RatioOutOfRange: the window's median ratio was outside (0, 10].
	RatioOutOfRange int
	// NoAnchor: the window would have given a pair but its recording had
	// too few usable seconds for a room-air anchor (Anchor), so an
	// anchored variant has no ratio for it.
	NoAnchor int
}

// Dropped is the number of windows that gave no pair.
func (r AlignReport) Dropped() int { return r.Windows - r.Kept }

// Add accumulates another report (several recordings into one file).
func (r *AlignReport) Add(o AlignReport) {
	r.Windows += o.Windows
	r.Kept += o.Kept
	r.NoReference += o.NoReference
	r.ReferenceUnstable += o.ReferenceUnstable
	r.LowQuality += o.LowQuality
	r.RatioOutOfRange += o.RatioOutOfRange
	r.NoAnchor += o.NoAnchor
}

func (r AlignReport) String() string {
	var reasons []string
	for _, x := range []struct {
		n    int
		what string
	}{
		{r.NoReference, "reference missing"},
		{r.ReferenceUnstable, "reference not stable"},
		{r.LowQuality, "too few good device seconds (ratio withheld or SQI low)"},
		{r.RatioOutOfRange, "ratio out of range"},
		{r.NoAnchor, "recording without a room-air anchor"},
	} {
		if x.n > 0 {
			reasons = append(reasons, fmt.Sprintf("%d %s", x.n, x.what))
		}
	}
	s := fmt.Sprintf("%d windows: %d pairs kept, %d dropped", r.Windows, r.Kept, r.Dropped())
	if len(reasons) > 0 {
		s += " (" + strings.Join(reasons, ", ") + ")"
	}
	return s
}

// Align pairs a prototype's per-second ratios with reference readings on
// the same clock. It cuts the device seconds into consecutive windows of
// WindowS seconds and keeps a window only where the reference was present
// and stable and enough device seconds had a ratio of good quality; the
// pair is the median ratio against the median reference of the window.
func Align(dev []DeviceSecond, ref []ReferenceSecond, o AlignOptions) ([]Pair, AlignReport, error) {
	var rep AlignReport
	o, err := o.withDefaults()
	if err != nil {
		return nil, rep, fmt.Errorf("align: %w", err)
	}
	if len(dev) == 0 {
		return nil, rep, nil
	}
	refAt := make(map[int64]float64, len(ref))
	for _, r := range ref {
		if !math.IsNaN(r.SpO2Pct) {
			refAt[r.Second] = r.SpO2Pct
		}
	}
	devAt := make(map[int64]DeviceSecond, len(dev))
	first, last := dev[0].Second, dev[0].Second
	for _, d := range dev {
		devAt[d.Second] = d
		first, last = min(first, d.Second), max(last, d.Second)
	}
	w := int64(o.WindowS)
	var pairs []Pair
	var ratios, refs, sqis []float64
	for start := first; start+w-1 <= last; start += w {
		rep.Windows++
		ratios, refs, sqis = ratios[:0], refs[:0], sqis[:0]
		for k := start; k < start+w; k++ {
			if v, ok := refAt[k+int64(o.ReferenceLagS)]; ok {
				refs = append(refs, v)
			}
			if d, ok := devAt[k]; ok && !math.IsNaN(d.Ratio) && d.SQI >= o.MinSQI {
				ratios = append(ratios, d.Ratio)
				sqis = append(sqis, d.SQI)
			}
		}
		if float64(len(refs)) < o.MinReferenceFraction*float64(w) {
			rep.NoReference++
			continue
		}
		lo, hi := math.Inf(1), math.Inf(-1)
		for _, v := range refs {
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
		if hi-lo > o.MaxReferenceSpreadPct {
			rep.ReferenceUnstable++
			continue
		}
		if float64(len(ratios)) < o.MinValidFraction*float64(w) {
			rep.LowQuality++
			continue
		}
		// ratios keeps its order (weightedMedian pairs it with sqis): the median
		// sorts a copy.
		p := Pair{Ratio: stats.Median(slices.Clone(ratios)), ReferencePct: stats.Median(refs), Subject: o.Subject}
		if o.QualityWeights {
			p.Ratio = weightedMedian(ratios, sqis)
			sum := 0.0
			for _, q := range sqis {
				sum += q
			}
			p.Weight = math.Min(1, sum/float64(w))
		}
		if p.validate() != nil {
			rep.RatioOutOfRange++
			continue
		}
		pairs = append(pairs, p)
		rep.Kept++
	}
	return pairs, rep, nil
}

// weightedMedian is the value at which the cumulative weight of the sorted
// values first reaches half of the total (the lower weighted median). xs
// and ws are not modified.
func weightedMedian(xs, ws []float64) float64 {
	idx := make([]int, len(xs))
	total := 0.0
	for i := range idx {
		idx[i] = i
		total += ws[i]
	}
	sort.Slice(idx, func(a, b int) bool { return xs[idx[a]] < xs[idx[b]] })
	acc := 0.0
	for _, i := range idx {
		acc += ws[i]
		if acc >= total/2 {
			return xs[i]
		}
	}
	return xs[idx[len(idx)-1]]
}
