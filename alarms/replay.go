package alarms

import (
	"encoding/csv"
	"fmt"
	"io"
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
