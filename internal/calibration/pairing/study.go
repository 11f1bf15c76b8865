package pairing

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strings"

	"gonum.org/v1/gonum/stat"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
)

// Recording is one raw recording with its reference, read once for a
// study of several ways of pairing it.
type Recording struct {
	// Subject is the person; leave-one-subject-out holds out all of a
	// subject's recordings together (both hands, say).
	Subject string
	// Channels holds each raw column by name.
	Channels  map[string][]float64
	Reference []calibration.ReferenceSecond
}

// Variant is one way of pairing: which two channels, which ratio method,
// which reference lag. The study's model selection chooses among them.
type Variant struct {
	First, Second string // channel columns: first ("red") and second ("infrared")
	Ratio         estimator.RatioMethod
	LagS          int // Align.ReferenceLagS
	// AnchorS > 0 divides each recording's ratios by its room-air anchor
	// over the first AnchorS seconds (calibration.Anchor); 0 = raw ratio.
	AnchorS int
}

// MinAnchorSeconds is how many usable seconds a recording's anchor needs
// (docs/calibration-protocol.md, version 1).
const MinAnchorSeconds = 10

// Name is "first/second method lag N s[ anchor A s]".
func (v Variant) Name() string {
	r := v.Ratio
	if r == "" {
		r = estimator.RatioBeatSlope
	}
	s := fmt.Sprintf("%s/%s %s lag %d s", v.First, v.Second, r, v.LagS)
	if v.AnchorS > 0 {
		s += fmt.Sprintf(" anchor %d s", v.AnchorS)
	}
	return s
}

// Variants is every combination of the channel pairs, ratio methods and
// lags given, in that nesting order, with the raw ratio (no anchor).
func Variants(channels [][2]string, ratios []estimator.RatioMethod, lags []int) []Variant {
	return AnchoredVariants(channels, ratios, lags, []int{0})
}

// AnchoredVariants is every combination of the channel pairs, ratio
// methods, lags and anchor lengths (0 = no anchor) given, in that nesting
// order.
func AnchoredVariants(channels [][2]string, ratios []estimator.RatioMethod, lags, anchors []int) []Variant {
	var out []Variant
	for _, c := range channels {
		for _, r := range ratios {
			for _, l := range lags {
				for _, a := range anchors {
					out = append(out, Variant{First: c[0], Second: c[1], Ratio: r, LagS: l, AnchorS: a})
				}
			}
		}
	}
	return out
}

// ReadChannels reads the named columns of a raw CSV (header row; every row
// needs a number in each named column; an error names the line and the
// column).
func ReadChannels(r io.Reader, cols []string) (map[string][]float64, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	header, err := cr.Read()
	if err != nil {
		return nil, fmt.Errorf("raw: header: %w", noEOF(err))
	}
	idx := make([]int, len(cols))
	for k, c := range cols {
		if idx[k] = colIndex(header, c); idx[k] < 0 {
			return nil, fmt.Errorf("raw: header %q: no column %q", strings.Join(header, ","), c)
		}
	}
	out := make(map[string][]float64, len(cols))
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("raw: %w", err)
		}
		line, _ := cr.FieldPos(0)
		for k, c := range cols {
			v, err := number(rec, idx[k])
			if err != nil {
				return nil, fmt.Errorf("raw: line %d: %s: %w", line, c, err)
			}
			out[c] = append(out[c], v)
		}
	}
	if len(out[cols[0]]) == 0 {
		return nil, errors.New("raw: no samples after the header")
	}
	return out, nil
}

// Candidates pairs every recording under every variant (see NewStudy) and
// returns one calibration.Candidate per variant, named by Variant.Name,
// with the pairing report of each.
func Candidates(recs []Recording, vs []Variant, o Options) ([]calibration.Candidate, []calibration.AlignReport, error) {
	st, err := NewStudy(recs, vs, o)
	if err != nil {
		return nil, nil, err
	}
	return st.Candidates, st.Reports, nil
}

// Study is every recording paired under every variant, with what a
// choice among the variants may use besides the pairs: per variant and
// subject, how many device seconds had a usable ratio (reference-free) and
// how well the per-second ratio tracked the reference within each
// recording.
type Study struct {
	// Subjects are the recordings' subjects in order of first appearance,
	// whether or not any variant gave them pairs.
	Subjects   []string
	Variants   []Variant
	Candidates []calibration.Candidate
	Reports    []calibration.AlignReport
	// usable[i][subject] = {seconds with a ratio and SQI >= MinSQI, seconds}
	usable []map[string][2]int
	// track[i][subject] = per recording, -Pearson(ratio_k, reference_{k+lag})
	// over the usable seconds (a falling saturation raises R).
	track []map[string][]float64
}

// NewStudy pairs every recording under every variant. The estimator runs
// once per recording, channel pair and ratio method; lags only move the
// reference. o gives the sample rate, ADC bits, averaging and the Align
// checks; its channels, ratio, lag and subject are set from the variant
// and the recording.
func NewStudy(recs []Recording, vs []Variant, o Options) (*Study, error) {
	ao, err := alignDefaults(o.Align)
	if err != nil {
		return nil, err
	}
	st := &Study{
		Variants:   vs,
		Candidates: make([]calibration.Candidate, len(vs)),
		Reports:    make([]calibration.AlignReport, len(vs)),
		usable:     make([]map[string][2]int, len(vs)),
		track:      make([]map[string][]float64, len(vs)),
	}
	for i, v := range vs {
		st.Candidates[i].Name = v.Name()
		st.usable[i] = map[string][2]int{}
		st.track[i] = map[string][]float64{}
	}
	type key struct {
		a, b string
		r    estimator.RatioMethod
	}
	for _, rec := range recs {
		if !slices.Contains(st.Subjects, rec.Subject) {
			st.Subjects = append(st.Subjects, rec.Subject)
		}
		dev := map[key][]calibration.DeviceSecond{}
		refAt := map[int64]float64{}
		for _, r := range rec.Reference {
			if !math.IsNaN(r.SpO2Pct) {
				refAt[r.Second] = r.SpO2Pct
			}
		}
		for i, v := range vs {
			k := key{v.First, v.Second, v.Ratio}
			d, ok := dev[k]
			if !ok {
				first, second := rec.Channels[v.First], rec.Channels[v.Second]
				if first == nil || second == nil {
					return nil, fmt.Errorf("subject %s: variant %s: no channel %q or %q in the recording", rec.Subject, v.Name(), v.First, v.Second)
				}
				oo := o
				oo.Ratio = v.Ratio
				var err error
				if d, err = DeviceSeconds(Raw{Red: first, IR: second}, oo); err != nil {
					return nil, fmt.Errorf("subject %s: %w", rec.Subject, err)
				}
				dev[k] = d
			}
			p, rep, err := alignVariant(d, rec, v, o, ao.MinSQI)
			if err != nil {
				return nil, err
			}
			st.Candidates[i].Pairs = append(st.Candidates[i].Pairs, p...)
			st.Reports[i].Add(rep)
			u := st.usable[i][rec.Subject]
			var xs, ys []float64
			for _, s := range d {
				u[1]++
				if math.IsNaN(s.Ratio) || s.SQI < ao.MinSQI {
					continue
				}
				u[0]++
				if r, ok := refAt[s.Second+int64(v.LagS)]; ok {
					xs, ys = append(xs, s.Ratio), append(ys, r)
				}
			}
			st.usable[i][rec.Subject] = u
			if len(xs) >= 3 {
				st.track[i][rec.Subject] = append(st.track[i][rec.Subject], -stat.Correlation(xs, ys, nil))
			}
		}
	}
	return st, nil
}

// alignVariant pairs one recording's device seconds under a variant: the
// reference moved by its lag and, for an anchored variant, every ratio
// divided by the recording's room-air anchor. A recording without an
// anchor gives no pairs; the windows that would have given one are
// counted as NoAnchor.
func alignVariant(d []calibration.DeviceSecond, rec Recording, v Variant, o Options, minSQI float64) ([]calibration.Pair, calibration.AlignReport, error) {
	a := o.Align
	a.ReferenceLagS, a.Subject = v.LagS, rec.Subject
	if v.AnchorS > 0 {
		r0, _, ok, err := calibration.Anchor(d, calibration.AnchorOptions{LengthS: v.AnchorS, MinSQI: minSQI, MinSeconds: o.minAnchorSeconds(), AtRecordingStart: o.AnchorAtRecordingStart})
		if err != nil {
			return nil, calibration.AlignReport{}, fmt.Errorf("subject %s: variant %s: %w", rec.Subject, v.Name(), err)
		}
		if ok {
			d = calibration.Anchored(d, r0)
		} else {
			_, rep, err := calibration.Align(d, rec.Reference, a)
			if err != nil {
				return nil, rep, fmt.Errorf("subject %s: variant %s: %w", rec.Subject, v.Name(), err)
			}
			rep.NoAnchor, rep.Kept = rep.Kept, 0
			return nil, rep, nil
		}
	}
	p, rep, err := calibration.Align(d, rec.Reference, a)
	if err != nil {
		return nil, rep, fmt.Errorf("subject %s: variant %s: %w", rec.Subject, v.Name(), err)
	}
	return p, rep, nil
}

// alignDefaults fills in Align's defaults (the MinSQI the study counts
// usable seconds by).
func alignDefaults(o calibration.AlignOptions) (calibration.AlignOptions, error) {
	if o.MinSQI == 0 {
		o.MinSQI = 0.5
	}
	if !(o.MinSQI > 0 && o.MinSQI <= 1) {
		return o, fmt.Errorf("align: MinSQI: %v, want (0, 1]", o.MinSQI)
	}
	return o, nil
}

// RuleChooser chooses without scoring any candidate against the reference
// across people, so it cannot tune on the held-out subject or overfit the
// few training subjects' offsets:
//
//  1. the ratio method is fixed beforehand (ratio);
//  2. the channel pair is the one whose ratio was usable (present, SQI >=
//     MinSQI) on the largest share of the training subjects' seconds; the
//     reference plays no part;
//  3. the reference lag is the one at which the per-second ratio tracked the
//     reference best within the training recordings (mean of -Pearson r per
//     recording); within one recording a person's offset cancels, so this
//     estimates timing, not calibration.
//
// Ties go to the earlier variant.
func (st *Study) RuleChooser(ratio estimator.RatioMethod) calibration.Chooser {
	return func(train []string) (calibration.Choice, error) {
		type pair struct{ a, b string }
		share := map[pair][2]int{}
		var order []pair
		for i, v := range st.Variants {
			if v.Ratio != ratio {
				continue
			}
			p := pair{v.First, v.Second}
			if _, ok := share[p]; !ok {
				order = append(order, p)
				// Usable seconds do not depend on the lag: count one variant.
				var u [2]int
				for _, s := range train {
					u[0] += st.usable[i][s][0]
					u[1] += st.usable[i][s][1]
				}
				share[p] = u
			}
		}
		if len(order) == 0 {
			return calibration.Choice{}, fmt.Errorf("rule: no variant with ratio method %q", ratio)
		}
		bestP, bestShare := order[0], -1.0
		for _, p := range order {
			u := share[p]
			if f := float64(u[0]) / float64(max(u[1], 1)); f > bestShare {
				bestP, bestShare = p, f
			}
		}
		best, bestTrack := -1, math.Inf(-1)
		for i, v := range st.Variants {
			if v.Ratio != ratio || (pair{v.First, v.Second}) != bestP {
				continue
			}
			var sum float64
			var n int
			for _, s := range train {
				for _, c := range st.track[i][s] {
					sum += c
					n++
				}
			}
			if n == 0 {
				continue
			}
			if m := sum / float64(n); m > bestTrack {
				best, bestTrack = i, m
			}
		}
		if best < 0 {
			return calibration.Choice{}, fmt.Errorf("rule: channels %s/%s: no training recording with a usable ratio and reference", bestP.a, bestP.b)
		}
		return calibration.Choice{
			Index:       best,
			Why:         fmt.Sprintf("ratio usable on %.0f %% of training seconds; tracks the reference with r = %.2f within recordings", 100*bestShare, bestTrack),
			InnerMAEPct: math.NaN(),
		}, nil
	}
}
