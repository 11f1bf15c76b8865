package pairing

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"strings"

	"github.com/pulsefleet/pulsefleet/calibration"
	"github.com/pulsefleet/pulsefleet/estimator"
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
}

// Name is "first/second method lag N s".
func (v Variant) Name() string {
	r := v.Ratio
	if r == "" {
		r = estimator.RatioBeatSlope
	}
	return fmt.Sprintf("%s/%s %s lag %d s", v.First, v.Second, r, v.LagS)
}

// Variants is every combination of the channel pairs, ratio methods and
// lags given, in that nesting order.
func Variants(channels [][2]string, ratios []estimator.RatioMethod, lags []int) []Variant {
	var out []Variant
	for _, c := range channels {
		for _, r := range ratios {
			for _, l := range lags {
				out = append(out, Variant{First: c[0], Second: c[1], Ratio: r, LagS: l})
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

// Candidates pairs every recording under every variant (the estimator
// runs once per recording, channel pair and ratio method; lags only move
// the reference) and returns one calibration.Candidate per variant, named
// by Variant.Name, with the pairing report of each. o gives the sample
// rate, ADC bits, averaging and the Align checks; its channels, ratio, lag
// and subject are set from the variant and the recording.
func Candidates(recs []Recording, vs []Variant, o Options) ([]calibration.Candidate, []calibration.AlignReport, error) {
	cands := make([]calibration.Candidate, len(vs))
	reps := make([]calibration.AlignReport, len(vs))
	for i, v := range vs {
		cands[i].Name = v.Name()
	}
	type key struct {
		a, b string
		r    estimator.RatioMethod
	}
	for _, rec := range recs {
		dev := map[key][]calibration.DeviceSecond{}
		for i, v := range vs {
			k := key{v.First, v.Second, v.Ratio}
			d, ok := dev[k]
			if !ok {
				first, second := rec.Channels[v.First], rec.Channels[v.Second]
				if first == nil || second == nil {
					return nil, nil, fmt.Errorf("subject %s: variant %s: no channel %q or %q in the recording", rec.Subject, v.Name(), v.First, v.Second)
				}
				oo := o
				oo.Ratio = v.Ratio
				var err error
				if d, err = DeviceSeconds(Raw{Red: first, IR: second}, oo); err != nil {
					return nil, nil, fmt.Errorf("subject %s: %w", rec.Subject, err)
				}
				dev[k] = d
			}
			ao := o.Align
			ao.ReferenceLagS, ao.Subject = v.LagS, rec.Subject
			p, rep, err := calibration.Align(d, rec.Reference, ao)
			if err != nil {
				return nil, nil, fmt.Errorf("subject %s: variant %s: %w", rec.Subject, v.Name(), err)
			}
			cands[i].Pairs = append(cands[i].Pairs, p...)
			reps[i].Add(rep)
		}
	}
	return cands, reps, nil
}
