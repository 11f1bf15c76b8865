package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/calibration"
	"github.com/pulsefleet/pulsefleet/internal/calibration/pairing"
	"github.com/pulsefleet/pulsefleet/internal/caution"
)

const calibrateStudySynopsis = "study --raw FILE --reference FILE [--subject NAME] ... --rate HZ [--channels A/B,...] [--ratios slope,derivative,spectral] [--lags 0,5,...] [--anchors 0,60,...] [--format text|json]"

// runCalibrateStudy pairs recordings under every variant (channel pair,
// ratio method, reference lag) and scores two ways of choosing among them
// by leave-one-subject-out, neither of which sees the held-out subject.
func runCalibrateStudy(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("calibrate", calibrateStudySynopsis, s.err)
	var raws, refs, subs stringList
	var channels, ratios, lags, anchors, ruleRatio, model, format string
	o := pairing.Options{Align: calibration.AlignOptions{}}
	fs.Var(&raws, "raw", "raw CSV with every channel column named in --channels; repeat for several recordings (both hands of a person: same --subject)")
	fs.Var(&refs, "reference", "reference CSV: t_s,spo2_ref_pct (or reference_pct); one per --raw, or one for all")
	fs.Var(&subs, "subject", "subject of each --raw (repeat in order; default: the raw file's folder name); leave-one-subject-out holds out a subject's recordings together")
	fs.Float64Var(&o.RateHz, "rate", 0, "raw sample rate, Hz (required)")
	fs.StringVar(&channels, "channels", "red/ir", "channel pairs to compare, first/second, comma-separated (e.g. r/g,b/g,r/b)")
	fs.StringVar(&ratios, "ratios", "slope,derivative,spectral", "ratio methods to compare: slope, derivative, spectral")
	fs.StringVar(&lags, "lags", "0,5,10,15,20,25,30", "reference lags to compare, s (device second k against reference second k+lag)")
	fs.StringVar(&anchors, "anchors", "0", "room-air anchor lengths to compare, s (each recording's ratios divided by their median over A s from its first usable second; 0 = raw ratio); the tracking chooser uses the first")
	fs.BoolVar(&o.AnchorAtRecordingStart, "anchor-at-start", false, "start the anchor at the recording's first second instead of its first usable one (docs/calibration-protocol.md version 1)")
	fs.StringVar(&ruleRatio, "rule-ratio", string(estimator.RatioDerivativeSlope), "the ratio method the rule fixes beforehand")
	fs.StringVar(&model, "model", calibration.Linear, "curve model: linear or quadratic")
	fs.IntVar(&o.ADCBits, "adc-bits", 0, "converter resolution in bits; 0 = unknown (float input)")
	fs.IntVar(&o.Align.WindowS, "window", 30, "pairing window, s: one pair per stable window")
	fs.Float64Var(&o.Align.MaxReferenceSpreadPct, "max-spread", 2, "stable: reference max-min within a window at most this, % SpO2")
	fs.Float64Var(&o.Align.MinSQI, "min-sqi", 0.5, "a device second counts when its SQI is at least this (0..1)")
	fs.BoolVar(&o.Align.QualityWeights, "quality-weights", true, "SQI-weighted window ratio and weighted fit")
	fs.StringVar(&format, "format", "text", "output: text or json")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if err := checkRecordingArgs(raws, refs, subs, o.RateHz); err != nil {
		return err
	}
	switch {
	case model != calibration.Linear && model != calibration.Quadratic:
		return usagef("--model: %q, want linear or quadratic", model)
	case format != "text" && format != "json":
		return usagef("--format: %q, want text or json", format)
	}
	pairsList, cols, err := parseChannelPairs(channels)
	if err != nil {
		return err
	}
	methods, rule, err := parseStudyRatios(ratios, ruleRatio)
	if err != nil {
		return err
	}
	lagList, err := parseStudyLags(lags)
	if err != nil {
		return err
	}
	anchorList, err := parseStudyAnchors(anchors)
	if err != nil {
		return err
	}
	recs, err := readStudyRecordings(raws, refs, subs, cols)
	if err != nil {
		return err
	}
	st, err := pairing.NewStudy(recs, pairing.AnchoredVariants(pairsList, methods, lagList, anchorList), o)
	if err != nil {
		return err
	}
	ev, err := evaluateStudy(st, model, rule, anchorList[0])
	if err != nil {
		return err
	}
	if format == "json" {
		return calibration.WriteStudyJSON(s.out, map[string]*calibration.Nested{"nested": ev.nested, "tracking": ev.tracking, "rule": ev.rule}, map[string]any{
			"variants": len(st.Candidates), "subjects": st.Subjects, "tracking_anchor_s": anchorList[0],
			"choice_nested": ev.pick[0], "choice_tracking": ev.pick[1], "choice_rule": ev.pick[2],
		})
	}
	fmt.Fprintf(s.out, "%d recordings of %d subjects, %d variants (channels x ratio methods x lags x anchors)\n\n", len(recs), len(st.Subjects), len(st.Candidates))
	return printStudyText(s.out, ev, rule, anchorList[0])
}

// studyEvaluation is the three choosers' leave-one-subject-out results
// and what each picks on all subjects (nested, tracking, rule).
type studyEvaluation struct {
	nested, tracking, rule *calibration.Nested
	pick                   [3]string
}

// evaluateStudy runs every chooser over every recorded subject (a subject
// no variant gave pairs is withheld, not dropped) and asks each for its
// pick on all subjects.
func evaluateStudy(st *pairing.Study, model string, rule estimator.RatioMethod, trackAnchor int) (*studyEvaluation, error) {
	ev := &studyEvaluation{}
	var err error
	if ev.nested, err = st.Nested(model); err != nil {
		return nil, fmt.Errorf("nested leave-one-subject-out: %w", err)
	}
	if ev.tracking, err = st.With(model, st.TrackingChooser(trackAnchor)); err != nil {
		return nil, fmt.Errorf("tracking leave-one-subject-out: %w", err)
	}
	if ev.rule, err = st.With(model, st.RuleChooser(rule)); err != nil {
		return nil, fmt.Errorf("rule leave-one-subject-out: %w", err)
	}
	for i, ch := range []calibration.Chooser{calibration.InnerLOSO(st.Candidates, model), st.TrackingChooser(trackAnchor), st.RuleChooser(rule)} {
		c, err := ch(st.Subjects)
		if err != nil {
			return nil, fmt.Errorf("choice on all subjects: %w", err)
		}
		ev.pick[i] = st.Candidates[c.Index].Name
	}
	return ev, nil
}

// printStudyText writes the choosers' leave-one-subject-out results and
// their picks on all subjects as text.
func printStudyText(w io.Writer, ev *studyEvaluation, rule estimator.RatioMethod, trackAnchor int) error {
	if err := ev.nested.WriteText(w, "nested: variant with the lowest inner leave-one-subject-out MAE"); err != nil {
		return err
	}
	fmt.Fprintln(w)
	if err := ev.tracking.WriteText(w, fmt.Sprintf("tracking: variant (anchor %d s) whose ratio tracks the reference best within training recordings", trackAnchor)); err != nil {
		return err
	}
	fmt.Fprintln(w)
	if err := ev.rule.WriteText(w, fmt.Sprintf("rule: ratio %s fixed beforehand, channels by usable seconds, lag by within-recording tracking", rule)); err != nil {
		return err
	}
	fmt.Fprintf(w, "\non all subjects: nested picks %s; tracking picks %s; rule picks %s\n", ev.pick[0], ev.pick[1], ev.pick[2])
	fmt.Fprintln(w, "fit a curve with: calibrate pairs (--red-col/--ir-col/--ratio/--lag of the pick, --quality-weights) then calibrate --pairs.")
	fmt.Fprintln(w, "anchor A s: each recording's ratios divided by their median over A s from its first usable second (the person at rest on room air);")
	fmt.Fprintln(w, "  to deploy an anchored pick: calibrate pairs --anchor A (its channels, ratio method and lag), then calibrate --pairs: the curve file")
	fmt.Fprintln(w, "  says input: anchored_ratio, and the gateway shows SpO2 as not available until each device's anchor is complete.")
	fmt.Fprintln(w, "bias = mean(predicted - reference); SD = population SD; Arms^2 = bias^2 + SD^2; the mean predictor predicts the training subjects' mean reference.")
	fmt.Fprintf(w, "\n%s\n", caution.Line)
	return nil
}

// parseStudyRatios reads --ratios and --rule-ratio; the rule's method must
// be among those compared.
func parseStudyRatios(ratios, ruleRatio string) ([]estimator.RatioMethod, estimator.RatioMethod, error) {
	var methods []estimator.RatioMethod
	for _, r := range strings.Split(ratios, ",") {
		m, err := parseRatio(strings.TrimSpace(r))
		if err != nil {
			return nil, "", usagef("--ratios: %v", err)
		}
		methods = append(methods, m)
	}
	rule, err := parseRatio(ruleRatio)
	if err != nil {
		return nil, "", usagef("--rule-ratio: %v", err)
	}
	if !slices.Contains(methods, rule) {
		return nil, "", usagef("--rule-ratio: %q is not among --ratios %q", rule, ratios)
	}
	return methods, rule, nil
}

// parseStudyLags reads --lags: integers -600..600 s.
func parseStudyLags(lags string) ([]int, error) {
	var lagList []int
	for _, l := range strings.Split(lags, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(l))
		if err != nil || v < -600 || v > 600 {
			return nil, usagef("--lags: %q, want integers -600..600 s", l)
		}
		lagList = append(lagList, v)
	}
	return lagList, nil
}

// parseStudyAnchors reads --anchors: integers 0..3600 s (0 = raw ratio).
func parseStudyAnchors(anchors string) ([]int, error) {
	var out []int
	for _, a := range strings.Split(anchors, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(a))
		if err != nil || v < 0 || v > 3600 {
			return nil, usagef("--anchors: %q, want integers 0..3600 s (0 = no anchor)", a)
		}
		out = append(out, v)
	}
	return out, nil
}

// readStudyRecordings reads each --raw with its --reference (one for all,
// or one each) and its --subject (default: the raw file's folder name).
func readStudyRecordings(raws, refs, subs []string, cols []string) ([]pairing.Recording, error) {
	var recs []pairing.Recording
	for i, raw := range raws {
		ref := refs[0]
		if len(refs) > 1 {
			ref = refs[i]
		}
		subject := filepath.Base(filepath.Dir(raw))
		if len(subs) > 0 {
			subject = subs[i]
		}
		rec, err := readStudyRecording(raw, ref, subject, cols)
		if err != nil {
			return nil, err
		}
		recs = append(recs, rec)
	}
	return recs, nil
}

// parseChannelPairs reads "a/b,c/d" into pairs and the distinct columns.
func parseChannelPairs(s string) ([][2]string, []string, error) {
	var out [][2]string
	var cols []string
	for _, p := range strings.Split(s, ",") {
		a, b, ok := strings.Cut(strings.TrimSpace(p), "/")
		if !ok || a == "" || b == "" || a == b {
			return nil, nil, usagef("--channels: %q, want first/second with two different column names", p)
		}
		out = append(out, [2]string{a, b})
		for _, c := range []string{a, b} {
			if !slices.Contains(cols, c) {
				cols = append(cols, c)
			}
		}
	}
	return out, cols, nil
}

func parseRatio(s string) (estimator.RatioMethod, error) {
	for _, m := range estimator.RatioMethods {
		if string(m) == s {
			return m, nil
		}
	}
	return "", usagef("--ratio: %q, want %s, %s or %s", s, estimator.RatioBeatSlope, estimator.RatioDerivativeSlope, estimator.RatioSpectral)
}

func readStudyRecording(rawPath, refPath, subject string, cols []string) (pairing.Recording, error) {
	raw, err := os.Open(rawPath)
	if err != nil {
		return pairing.Recording{}, err
	}
	defer raw.Close()
	ch, err := pairing.ReadChannels(raw, cols)
	if err != nil {
		return pairing.Recording{}, fmt.Errorf("%s: %w", rawPath, err)
	}
	ref, err := os.Open(refPath)
	if err != nil {
		return pairing.Recording{}, err
	}
	defer ref.Close()
	rs, err := pairing.ReadReference(ref, "")
	if err != nil {
		return pairing.Recording{}, fmt.Errorf("%s: %w", refPath, err)
	}
	return pairing.Recording{Subject: subject, Channels: ch, Reference: rs}, nil
}
