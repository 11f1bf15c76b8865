package tune

import (
	"encoding/csv"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"html/template"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// ReportInfo is context for the report that the sweep does not know.
type ReportInfo struct {
	Source  string // where the trends came from ("store /var/lib/x", "trend.csv")
	Filters string // device and time filters applied, "" for none
	Command string // the command line, for the record
}

// Caution is printed in the report and by the command.
const Caution = "These figures replay recorded history; they do not predict the future. " +
	"Alarm settings are the clinical team's decision. " + caution.Text

// BestRows returns the indexes of the Pareto-optimal rows, by increasing
// alarm burden.
func BestRows(res *Result) []int {
	var out []int
	for i, r := range res.Rows {
		if r.Pareto {
			out = append(out, i)
		}
	}
	slices.SortStableFunc(out, func(a, b int) int { return cmpF(res.Rows[a].PerDeviceDay, res.Rows[b].PerDeviceDay) })
	return out
}

type reportRow struct {
	Name, Short                                  string
	Values                                       []string
	Episodes                                     int
	PerDay, InAlarm, Sens, PPV, Delay, P90, MedS string
	High, Medium, Low                            string
	Pareto                                       bool
	Raised, Avoided, Unreviewed                  int // against reviews
}

func toReportRow(res *Result, i int) reportRow {
	r := res.Rows[i]
	pct := func(f float64) string { return num(100*f, 1) }
	return reportRow{Name: res.Points[i].Name, Short: shortName(res.Points[i].Name), Values: res.Points[i].Values,
		Episodes: r.Episodes, PerDay: num(r.PerDeviceDay, 2), InAlarm: num(r.TimeInAlarmPct, 2),
		Sens: pct(r.Sensitivity), PPV: pct(r.PPV), Delay: num(r.MedianDelayS, 0), P90: num(r.P90DelayS, 0),
		MedS:   num(r.MedianEpisodeS, 0),
		High:   num(r.ByPriority[alarms.PriorityHigh].PerDeviceDay, 2),
		Medium: num(r.ByPriority[alarms.PriorityMedium].PerDeviceDay, 2),
		Low:    num(r.ByPriority[alarms.PriorityLow].PerDeviceDay, 2),
		Pareto: r.Pareto, Raised: r.EventsDetected, Avoided: r.NegativesAvoided, Unreviewed: r.UnreviewedAlarms}
}

// WriteReport writes the self-contained HTML report (no external
// resources): the frontier, alarms against the limit per delay, the best
// profiles, the exact settings and the caution.
func WriteReport(w io.Writer, res *Result, info ReportInfo) error {
	g := res.Grid
	baseYAML, err := g.Base.Marshal()
	if err != nil {
		return err
	}
	limSVG, limCaption := LimitSVG(res)
	var keys []template.HTML // may break after a dot
	for _, s := range g.Sweep {
		keys = append(keys, template.HTML(strings.ReplaceAll(template.HTMLEscapeString(s.Key), ".", ".<wbr>")))
	}
	var best, all []reportRow
	for _, i := range BestRows(res) {
		best = append(best, toReportRow(res, i))
	}
	for i := range res.Rows {
		all = append(all, toReportRow(res, i))
	}
	ref := ""
	if r := g.Reference.Rule; r != nil {
		ref = "rule: " + r.String()
		if res.ReferenceAveraging != "" {
			ref += " on the trends re-estimated at averaging " + res.ReferenceAveraging + " (the shortest), for every row"
		}
	} else if rs := g.Reference.Reviews; rs != nil {
		ref = fmt.Sprintf("operators' reviews of the gateway's episodes (%s): %d positive, %d negative, %d reviewed otherwise (neither), %d outside the data; the events are the positive ones",
			rs, res.ReviewedPositive, res.ReviewedNegative, res.ReviewedOther, res.ReviewsOutside)
	} else {
		ref = "annotated events from " + g.Reference.File
	}
	days := res.MonitoredS / 86400
	data := map[string]any{
		"Caution":    Caution,
		"Info":       info,
		"Devices":    res.Devices,
		"Hours":      fmt.Sprintf("%.1f", res.MonitoredS/3600),
		"Days":       fmt.Sprintf("%.2f", days),
		"Samples":    res.Samples,
		"Points":     len(res.Points),
		"Variants":   res.Variants,
		"Ref":        ref,
		"Grace":      fmtDur(g.Reference.Grace),
		"Scored":     strings.Join(res.Scored, ", "),
		"Events":     res.Events,
		"Outside":    res.EventsOutside,
		"Frontier":   template.HTML(FrontierSVG(res)),
		"LimitSVG":   template.HTML(limSVG),
		"LimitCap":   limCaption,
		"KeysHTML":   keys,
		"Best":       best,
		"All":        all,
		"BaseSource": g.BaseSource,
		"BaseYAML":   string(baseYAML),
		"GridText":   string(g.Text),
		"Range":      fmtRange(res.FirstS, res.LastS),
		"MaxGap":     fmtDur(time.Duration(res.MaxGapS * float64(time.Second))),
		"Estimated":  estimatedNote(res),
		"Reviews":    g.Reference.Reviews != nil,
		"Positive":   res.ReviewedPositive,
		"Negative":   res.ReviewedNegative,
	}
	return reportTmpl.Execute(w, data)
}

var reportTmpl = template.Must(template.New("report").Parse(`<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>pulsefleet alarm tuning report</title>
<style>
body{font-family:"DejaVu Sans",Arial,sans-serif;font-size:14px;color:#222;max-width:1000px;margin:24px auto;padding:0 16px;line-height:1.45}
h1{font-size:22px;margin:0 0 8px}h2{font-size:17px;margin:28px 0 8px;border-bottom:1px solid #ccc;padding-bottom:3px}
.caution{border:2px solid #a33;background:#fff6f5;padding:10px 14px;margin:12px 0}
table{border-collapse:collapse;font-size:13px;margin:8px 0}th,td{border:1px solid #ccc;padding:3px 8px;text-align:right}
th{background:#f2f2f2;font-weight:600}td.l,th.l{text-align:left}
pre{background:#f7f7f7;border:1px solid #ddd;padding:8px;font-size:12px;overflow:auto}
dl{display:grid;grid-template-columns:max-content auto;gap:2px 16px;margin:0}dt{color:#555}dd{margin:0}
figure{margin:10px 0}figcaption{font-size:13px;color:#444;max-width:900px}
</style></head><body>
<h1>Alarm tuning report</h1>
<div class="caution"><strong>Caution.</strong> {{.Caution}}</div>

<h2>Data and reference</h2>
<dl>
<dt>trend source</dt><dd>{{.Info.Source}}{{if .Info.Filters}} ({{.Info.Filters}}){{end}}</dd>
<dt>devices</dt><dd>{{.Devices}}</dd>
{{if .Estimated}}<dt>trends</dt><dd>{{.Estimated}}</dd>{{end}}
<dt>time range</dt><dd>{{.Range}}</dd>
<dt>monitored time</dt><dd>{{.Hours}} h = {{.Days}} device-days ({{.Samples}} samples; gaps over {{.MaxGap}} not counted)</dd>
<dt>grid</dt><dd>{{.Points}} profiles; the engine ran {{.Variants}} distinct condition settings</dd>
<dt>reference events</dt><dd>{{.Ref}}: {{.Events}} events{{if .Outside}} ({{.Outside}} outside the data, not scored){{end}}</dd>
<dt>scored conditions</dt><dd>{{.Scored}}; grace {{.Grace}}</dd>
</dl>
<p>Matching rule: an event is <em>detected</em> when an episode of a scored condition on the same device is in alarm
(announced, not yet ended) at some time between the event's start and its end plus the grace; the detection delay is
the time from the event's start to the first such announcement (zero when the alarm was already on).
An episode is a <em>true positive</em> when its alarm span meets some event's span plus the grace.
Sensitivity = detected events / events; PPV = true-positive episodes / scored episodes.
Alarms per device-day count every announced episode of every condition, exactly as <code>pulsefleet replay</code> lists them.</p>

<h2>Burden against sensitivity</h2>
<figure>{{.Frontier}}<figcaption>Each circle is one profile of the grid (hover for its settings). Filled and joined:
Pareto-optimal profiles (no other profile has fewer alarms per device-day and at least the same sensitivity).
Axes are zoomed to the data.</figcaption></figure>

<h2>Alarms per day against the limit</h2>
{{if .LimitSVG}}<figure>{{.LimitSVG}}<figcaption>{{.LimitCap}}</figcaption></figure>{{else}}<p>{{.LimitCap}}</p>{{end}}

<h2>Best profiles (Pareto-optimal, fewest alarms first)</h2>
<p>Alarms per device-day in total and by priority (an episode counts at the highest priority it reached);
delays from event start to announcement.</p>
<table><tr><th class="l">profile</th>{{range .KeysHTML}}<th>{{.}}</th>{{end}}<th>alarms per day</th><th>high per day</th><th>medium per day</th><th>low per day</th><th>in alarm %</th>
<th>sensitivity %</th><th>PPV %</th><th>median delay s</th><th>p90 delay s</th></tr>
{{range .Best}}<tr><td class="l">{{.Short}}</td>{{range .Values}}<td>{{.}}</td>{{end}}<td>{{.PerDay}}</td><td>{{.High}}</td><td>{{.Medium}}</td><td>{{.Low}}</td><td>{{.InAlarm}}</td>
<td>{{.Sens}}</td><td>{{.PPV}}</td><td>{{.Delay}}</td><td>{{.P90}}</td></tr>
{{end}}</table>

{{if .Reviews}}<h2>Against the reviews</h2>
<p>Per profile: reviewed-positive episodes it still raises (an alarm of a scored condition matches them by the rule above),
reviewed-negative episodes it would avoid (no alarm matches them), and its alarms that match no reviewed episode of any label:
nobody reviewed those, so whether they were real is not known, and PPV is not given.</p>
<table><tr><th class="l">profile</th>{{range .KeysHTML}}<th>{{.}}</th>{{end}}<th>alarms per day</th><th>positives raised (of {{.Positive}})</th>
<th>sensitivity %</th><th>negatives avoided (of {{.Negative}})</th><th>unreviewed alarms</th></tr>
{{range .All}}<tr><td class="l">{{.Short}}</td>{{range .Values}}<td>{{.}}</td>{{end}}<td>{{.PerDay}}</td><td>{{.Raised}}</td><td>{{.Sens}}</td><td>{{.Avoided}}</td><td>{{.Unreviewed}}</td></tr>
{{end}}</table>
{{end}}
<h2>Exact settings used</h2>
<p>Base profile ({{.BaseSource}}); every grid point is this profile with the swept values set. Each grid point's
full profile is in <code>profiles/NAME.yaml</code> beside this report, so any row can be checked with
<code>pulsefleet replay --profile profiles/NAME.yaml</code>.</p>
<pre>{{.BaseYAML}}</pre>
<p>Grid file:</p>
<pre>{{.GridText}}</pre>
{{if .Info.Command}}<p>Command: <code>{{.Info.Command}}</code></p>{{end}}
<details><summary>All {{.Points}} grid points</summary>
<table><tr><th class="l">profile</th>{{range .KeysHTML}}<th>{{.}}</th>{{end}}<th>episodes</th><th>alarms / device-day</th><th>time in alarm %</th><th>median episode s</th>
<th>sensitivity %</th><th>PPV %</th><th>median delay s</th><th>Pareto</th></tr>
{{range .All}}<tr><td class="l">{{.Name}}</td>{{range .Values}}<td>{{.}}</td>{{end}}<td>{{.Episodes}}</td><td>{{.PerDay}}</td><td>{{.InAlarm}}</td><td>{{.MedS}}</td>
<td>{{.Sens}}</td><td>{{.PPV}}</td><td>{{.Delay}}</td><td>{{if .Pareto}}yes{{end}}</td></tr>
{{end}}</table></details>
<p style="margin-top:24px;color:#555">{{.Caution}}</p>
</body></html>
`))

// TrendFile is where WriteOutputs puts the trends re-estimated at an
// averaging time (as written in the grid), relative to the output
// directory: trends/averaging-8s.csv.
func TrendFile(averaging string) string {
	return filepath.Join("trends", AveragingKey+"-"+averaging+".csv")
}

// WriteTrendCSV writes trends in the replay/tune trend format
// (t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi; missing values empty) after
// the caution comment line, every value exactly as held, so reading it back
// gives the same samples.
func WriteTrendCSV(w io.Writer, trends []alarms.Trend) error {
	if err := caution.WriteComment(w); err != nil {
		return fmt.Errorf("write trend: %w", err)
	}
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"t_s", "device", "spo2_pct", "pulse_bpm", "pi_pct", "sqi"}); err != nil {
		return fmt.Errorf("write trend: %w", err)
	}
	exact := func(f float64) string {
		if !finite(f) {
			return ""
		}
		return strconv.FormatFloat(f, 'g', -1, 64)
	}
	for _, tr := range trends {
		for _, s := range tr.Samples {
			if err := cw.Write([]string{exact(s.T), tr.Device, exact(s.SpO2), exact(s.Pulse), exact(s.PI), exact(s.SQI)}); err != nil {
				return fmt.Errorf("write trend: %w", err)
			}
		}
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("write trend: %w", err)
	}
	return nil
}

// estimatedNote describes how the trends were re-estimated; "" when they
// were swept as recorded.
func estimatedNote(res *Result) string {
	e := res.Estimated
	if e == nil {
		return ""
	}
	n := fmt.Sprintf("re-estimated from %d raw chunks (%d sample pairs) at each averaging time (%s), as the gateway estimates live; %d estimator (re)starts per averaging time",
		e.Chunks, e.SamplePairs, strings.Join(res.Grid.Sweep[0].Values, ", "), e.Restarts)
	if len(e.Skipped) > 0 {
		n += fmt.Sprintf("; %d devices without raw captures left out (%s)", len(e.Skipped), strings.Join(e.Skipped, ", "))
	}
	return n
}

// fmtRange shows the data's time range: as UTC dates when the times look
// like Unix seconds (after 2001), else as seconds on the file's clock.
func fmtRange(first, last float64) string {
	if !finite(first) || !finite(last) {
		return "no samples"
	}
	if first > 1e9 {
		f := time.UnixMilli(int64(first * 1000)).UTC().Format("2006-01-02 15:04:05")
		l := time.UnixMilli(int64(last * 1000)).UTC().Format("2006-01-02 15:04:05")
		return f + " to " + l + " UTC"
	}
	return fmt.Sprintf("t = %g s to %g s (file clock)", first, last)
}

// WriteOutputs writes summary.csv, frontier.svg, report.html and
// profiles/NAME.yaml (each grid point's profile) into dir, creating it;
// with averaging times also each one's re-estimated trends (TrendFile), so
// any row can be checked with replay.
func WriteOutputs(dir string, res *Result, info ReportInfo) error {
	if err := os.MkdirAll(filepath.Join(dir, "profiles"), 0o755); err != nil {
		return fmt.Errorf("create output: %w", err)
	}
	for _, pt := range res.Points {
		b, err := pt.Profile.Marshal()
		if err != nil {
			return err
		}
		b = append([]byte(caution.Comment), b...)
		if err := os.WriteFile(filepath.Join(dir, "profiles", pt.Name+".yaml"), b, 0o644); err != nil {
			return fmt.Errorf("write profile: %w", err)
		}
	}
	type output struct {
		name  string
		write func(io.Writer) error
	}
	files := []output{
		{"summary.csv", func(w io.Writer) error { return WriteSummaryCSV(w, res) }},
		{"frontier.svg", func(w io.Writer) error { _, err := io.WriteString(w, FrontierSVG(res)+"\n"); return err }},
		{"report.html", func(w io.Writer) error { return WriteReport(w, res, info) }},
	}
	if e := res.Estimated; e != nil {
		if err := os.MkdirAll(filepath.Join(dir, "trends"), 0o755); err != nil {
			return fmt.Errorf("create output: %w", err)
		}
		for a, v := range res.Grid.Sweep[0].Values {
			files = append(files, output{TrendFile(v), func(w io.Writer) error { return WriteTrendCSV(w, e.Trends[a]) }})
		}
	}
	for _, f := range files {
		path := filepath.Join(dir, f.name)
		fh, err := os.Create(path)
		if err != nil {
			return fmt.Errorf("create %s: %w", path, err)
		}
		if err := f.write(fh); err != nil {
			fh.Close()
			return fmt.Errorf("%s: %w", path, err)
		}
		if err := fh.Close(); err != nil {
			return fmt.Errorf("close %s: %w", path, err)
		}
	}
	return nil
}
