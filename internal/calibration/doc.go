// Package calibration fits and applies curves that map a prototype's ratio of
// ratios R to SpO2, and scores them the way accuracy standards do (Arms, bias,
// precision, Bland-Altman limits of agreement). It is pure: no I/O beyond
// reading and writing the files it is handed.
//
// The nouns:
//   - Curve: the calibration file (YAML) the estimator and the gateway load;
//     it satisfies the estimator's Calibration interface without importing it.
//   - Pair: one observation, R beside a reference saturation, optionally with
//     a subject; ReadPairs/WritePairs handle the pairs CSV (ratio,
//     reference_pct[,subject]).
//   - Fit/FitCoefficients: ordinary least squares, linear or quadratic in R
//     (QR decomposition, gonum/mat).
//   - Stats/Score: d = predicted - reference; bias = mean d; SD = population
//     SD of d, so Arms^2 = bias^2 + SD^2 exactly; LoA = bias -/+ 1.96 SD;
//     Arms per decade of reference (70-80, 80-90, 90-100 %).
//   - LOSO/LeaveOneSubjectOut: each subject held out in turn, scored beside a
//     baseline that predicts the other subjects' mean reference.
//   - Candidate/Nested: several ways of pairing the same recordings
//     (channels, ratio method, lag); LeaveOneSubjectOutWith holds each
//     subject out and lets a Chooser pick a candidate knowing only the other
//     subjects: InnerLOSO (nested leave-one-subject-out, Varma & Simon 2006)
//     or a rule (package pairing). The held-out subject never influences
//     the choice it is scored with. NestedOver takes the subjects
//     explicitly, so one that no candidate gave pairs is withheld, not
//     dropped.
//   - Anchor/Anchored: a recording's room-air anchor R0 (median usable
//     ratio over its first seconds at rest) and its ratios divided by it,
//     so that a curve maps R/R0 and a person's factor in R divides out
//     (docs/calibration-protocol.md).
//   - Pair.Weight: weighted least squares (Align's QualityWeights sets it
//     from the device's SQI); scores never weigh.
//   - Result/Calibrate: all of the above with text, JSON, SVG and HTML output.
//   - Align: per-second device ratios and reference readings into pairs over
//     stable, good-quality windows, with counts of what was dropped and why.
//     Package pairing runs raw recordings through the estimator for it.
//
// Caveats: a fit scored on its own pairs flatters it; trust the
// leave-one-subject-out numbers. Decades with fewer than MinPairsPerDecade
// pairs and reference ranges short of 70-100 % are flagged, not hidden. LOSO
// scores held-out ratios outside the training range by extending the
// polynomial (a curve in the field withholds them) and counts them.
package calibration
