package alarms

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"
)

// Run resets the engine and evaluates samples of one stream (T increasing;
// others are skipped), calling emit with each announced episode: when it
// ends (EndedS set), then, after the last sample, each one still active
// (EndedS NaN), in profile order. Withdrawn episodes are not reported. Run
// reuses the engine's buffers: a tuning sweep can call it for every stream
// without allocating per sample.
func (e *Engine) Run(samples []Sample, emit func(Episode)) {
	e.Reset()
	e.runOut = emit
	for i := range samples {
		e.Eval(samples[i], e.runEmit)
	}
	for i := range e.st {
		if e.conds[i].phase == Active {
			emit(e.st[i].ep)
		}
	}
	e.runOut = nil
}

func (e *Engine) runEvent(ev Event) {
	if ev.Type == EventEnded {
		e.runOut(ev.Episode)
	}
}

// SetDevice renames the stream for the episodes that follow (for reusing
// one engine over many recorded streams with Run).
func (e *Engine) SetDevice(device string) { e.device = device }

// Replay evaluates one stream's samples against p and calls emit with each
// announced episode, as Engine.Run. It is what `pulsefleet replay` and
// `pulsefleet tune` count.
func Replay(p *Profile, device string, samples []Sample, emit func(Episode)) error {
	e, err := NewEngine(p, device)
	if err != nil {
		return err
	}
	e.Run(samples, emit)
	return nil
}

// Trend is the recorded samples of one stream.
type Trend struct {
	Device  string
	Samples []Sample
}

// ReplayTrends replays every trend and returns the announced episodes in the
// replay output order: by announced_s, then device (in trend order), then
// condition (in profile order).
func ReplayTrends(p *Profile, trends []Trend) ([]Episode, error) {
	e, err := NewEngine(p, "")
	if err != nil {
		return nil, err
	}
	type keyed struct {
		ep        Episode
		dev, cond int
	}
	condIdx := map[string]int{}
	for i := range e.conds {
		condIdx[e.conds[i].name] = i
	}
	var all []keyed
	for d, tr := range trends {
		e.SetDevice(tr.Device)
		e.Run(tr.Samples, func(ep Episode) { all = append(all, keyed{ep, d, condIdx[ep.Condition]}) })
	}
	sort.SliceStable(all, func(i, j int) bool {
		a, b := &all[i], &all[j]
		if a.ep.AnnouncedS != b.ep.AnnouncedS {
			return a.ep.AnnouncedS < b.ep.AnnouncedS
		}
		if a.dev != b.dev {
			return a.dev < b.dev
		}
		if a.cond != b.cond {
			return a.cond < b.cond
		}
		return a.ep.OnsetS < b.ep.OnsetS
	})
	out := make([]Episode, len(all))
	for i := range all {
		out[i] = all[i].ep
	}
	return out, nil
}

// Trend CSV columns (CONTRACT).
var trendColumns = []string{"t_s", "device", "spo2_pct", "pulse_bpm", "pi_pct", "sqi"}

// trend CSV bounds per value column: a value outside is an error; spo2_pct
// 0 means "no reading" and is kept as missing.
var trendBounds = map[string][2]float64{
	"spo2_pct": {0, 100}, "pulse_bpm": {0, 350}, "pi_pct": {0, 100}, "sqi": {0, 1},
}

// ReadTrendCSV reads the replay/tune trend format:
// t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi with a header row (columns in any
// order; t_s and spo2_pct required, the others optional, unknown columns
// ignored). Empty cells are missing values; an empty or absent device is the
// stream "". Rows of different devices may interleave; each device's times
// must increase. Devices are returned in order of first appearance. Errors
// name the line, the column and the bound.
func ReadTrendCSV(r io.Reader) ([]Trend, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.ReuseRecord = true
	cr.Comment = '#'
	head, err := cr.Read()
	if err != nil {
		if errors.Is(err, io.EOF) {
			return nil, errors.New("trend csv: empty input, want a header row t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi")
		}
		return nil, fmt.Errorf("trend csv: header: %w", err)
	}
	col := map[string]int{}
	for i, h := range head {
		h = strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))
		if _, dup := col[h]; dup {
			return nil, fmt.Errorf("trend csv: header: column %q twice", h)
		}
		col[h] = i
	}
	for _, need := range []string{"t_s", "spo2_pct"} {
		if _, ok := col[need]; !ok {
			return nil, fmt.Errorf("trend csv: header: no %s column, want %s", need, strings.Join(trendColumns, ","))
		}
	}
	var trends []Trend
	byDev := map[string]int{}
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("trend csv: %w", err)
		}
		line, _ := cr.FieldPos(0)
		cell := func(name string) string {
			if i, ok := col[name]; ok && i < len(rec) {
				return strings.TrimSpace(rec[i])
			}
			return ""
		}
		ts := cell("t_s")
		t, err := strconv.ParseFloat(ts, 64)
		if err != nil || math.IsNaN(t) || math.IsInf(t, 0) {
			return nil, fmt.Errorf("trend csv: line %d: t_s %q, want a finite number of seconds", line, ts)
		}
		s := Sample{T: t}
		for _, f := range []struct {
			name string
			dst  *float64
		}{{"spo2_pct", &s.SpO2}, {"pulse_bpm", &s.Pulse}, {"pi_pct", &s.PI}, {"sqi", &s.SQI}} {
			*f.dst = math.NaN()
			c := cell(f.name)
			if c == "" {
				continue
			}
			v, err := strconv.ParseFloat(c, 64)
			b := trendBounds[f.name]
			if err != nil || !(v >= b[0] && v <= b[1]) {
				return nil, fmt.Errorf("trend csv: line %d: %s %q, want a number in [%g, %g] or empty", line, f.name, c, b[0], b[1])
			}
			*f.dst = v
		}
		dev := cell("device")
		i, ok := byDev[dev]
		if !ok {
			i = len(trends)
			byDev[dev] = i
			trends = append(trends, Trend{Device: dev})
		}
		tr := &trends[i]
		if n := len(tr.Samples); n > 0 && !(t > tr.Samples[n-1].T) {
			return nil, fmt.Errorf("trend csv: line %d: t_s %s for device %q, want after %s (times must increase per device)",
				line, ts, dev, strconv.FormatFloat(tr.Samples[n-1].T, 'f', -1, 64))
		}
		tr.Samples = append(tr.Samples, s)
	}
	return trends, nil
}

// EpisodeColumns is the replay output header (CONTRACT).
const EpisodeColumns = "device,condition,priority,onset_s,announced_s,escalated_s,ended_s,min_spo2_pct"

// WriteEpisodesCSV writes episodes in the replay output format; times that
// did not happen are empty cells.
func WriteEpisodesCSV(w io.Writer, eps []Episode) error {
	num := func(f float64) string {
		if f != f {
			return ""
		}
		return strconv.FormatFloat(f, 'f', -1, 64)
	}
	return writeCSV(w, "write episodes", EpisodeColumns, len(eps), func(i int) []string {
		ep := &eps[i]
		return []string{ep.Device, ep.Condition, ep.Priority.String(), num(ep.OnsetS),
			num(ep.AnnouncedS), num(ep.EscalatedS), num(ep.EndedS), num(ep.MinSpO2)}
	})
}

// writeCSV writes a header and n rows.
func writeCSV(w io.Writer, what, header string, n int, row func(i int) []string) error {
	cw := csv.NewWriter(w)
	if err := cw.Write(strings.Split(header, ",")); err != nil {
		return fmt.Errorf("%s: %w", what, err)
	}
	for i := 0; i < n; i++ {
		if err := cw.Write(row(i)); err != nil {
			return fmt.Errorf("%s: %w", what, err)
		}
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("%s: %w", what, err)
	}
	return nil
}
