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

const calibrateStudySynopsis = "study --raw FILE --reference FILE [--subject NAME] ... --rate HZ [--channels A/B,...] [--ratios slope,derivative,spectral] [--lags 0,5,...] [--format text|json]"

// runCalibrateStudy pairs recordings under every variant (channel pair,
// ratio method, reference lag) and scores two ways of choosing among them
// by leave-one-subject-out, neither of which sees the held-out subject.
func runCalibrateStudy(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("calibrate", calibrateStudySynopsis, s.err)
	var raws, refs, subs stringList
	var channels, ratios, lags, ruleRatio, model, format string
	o := pairing.Options{Align: calibration.AlignOptions{}}
	fs.Var(&raws, "raw", "raw CSV with every channel column named in --channels; repeat for several recordings (both hands of a person: same --subject)")
	fs.Var(&refs, "reference", "reference CSV: t_s,spo2_ref_pct (or reference_pct); one per --raw, or one for all")
	fs.Var(&subs, "subject", "subject of each --raw (repeat in order; default: the raw file's folder name); leave-one-subject-out holds out a subject's recordings together")
	fs.Float64Var(&o.RateHz, "rate", 0, "raw sample rate, Hz (required)")
	fs.StringVar(&channels, "channels", "red/ir", "channel pairs to compare, first/second, comma-separated (e.g. r/g,b/g,r/b)")
	fs.StringVar(&ratios, "ratios", "slope,derivative,spectral", "ratio methods to compare: slope, derivative, spectral")
	fs.StringVar(&lags, "lags", "0,5,10,15,20,25,30", "reference lags to compare, s (device second k against reference second k+lag)")
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
	recs, err := readStudyRecordings(raws, refs, subs, cols)
	if err != nil {
		return err
	}
	st, err := pairing.NewStudy(recs, pairing.Variants(pairsList, methods, lagList), o)
	if err != nil {
		return err
	}
	nested, err := calibration.NestedLeaveOneSubjectOut(st.Candidates, model)
	if err != nil {
		return fmt.Errorf("nested leave-one-subject-out: %w", err)
	}
	ruled, err := calibration.LeaveOneSubjectOutWith(st.Candidates, model, st.RuleChooser(rule))
	if err != nil {
		return fmt.Errorf("rule leave-one-subject-out: %w", err)
	}
	// What each chooser picks on all subjects: the variant to pair with.
	all := studySubjects(recs)
	finalNested, err := calibration.InnerLOSO(st.Candidates, model)(all)
	if err != nil {
		return fmt.Errorf("choice on all subjects: %w", err)
	}
	finalRule, err := st.RuleChooser(rule)(all)
	if err != nil {
		return fmt.Errorf("choice on all subjects: %w", err)
	}
	if format == "json" {
		return calibration.WriteStudyJSON(s.out, map[string]*calibration.Nested{"nested": nested, "rule": ruled}, map[string]any{
			"variants": len(st.Candidates), "subjects": all,
			"choice_nested": st.Candidates[finalNested.Index].Name, "choice_rule": st.Candidates[finalRule.Index].Name,
		})
	}
	fmt.Fprintf(s.out, "%d recordings of %d subjects, %d variants (channels x ratio methods x lags)\n\n", len(recs), len(all), len(st.Candidates))
	return printStudyText(s.out, nested, ruled, rule, st.Candidates[finalNested.Index].Name, st.Candidates[finalRule.Index].Name)
}

// printStudyText writes both choosers' leave-one-subject-out results and
// their picks on all subjects as text.
func printStudyText(w io.Writer, nested, ruled *calibration.Nested, rule estimator.RatioMethod, pickNested, pickRule string) error {
	if err := nested.WriteText(w, "nested: variant with the lowest inner leave-one-subject-out MAE"); err != nil {
		return err
	}
	fmt.Fprintln(w)
	if err := ruled.WriteText(w, fmt.Sprintf("rule: ratio %s fixed beforehand, channels by usable seconds, lag by within-recording tracking", rule)); err != nil {
		return err
	}
	fmt.Fprintf(w, "\non all subjects: nested picks %s; rule picks %s\n", pickNested, pickRule)
	fmt.Fprintln(w, "fit a curve with: calibrate pairs (--red-col/--ir-col/--ratio/--lag of the pick, --quality-weights) then calibrate --pairs.")
	fmt.Fprintln(w, "bias = mean(predicted - reference); SD = population SD; Arms^2 = bias^2 + SD^2; the mean predictor predicts the training subjects' mean reference.")
	fmt.Fprintf(w, "\n%s\n", caution.Line)
	return nil
}

// studySubjects lists the recordings' subjects, each once, in order.
func studySubjects(recs []pairing.Recording) []string {
	var all []string
	for _, r := range recs {
		if !slices.Contains(all, r.Subject) {
			all = append(all, r.Subject)
		}
	}
	return all
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
