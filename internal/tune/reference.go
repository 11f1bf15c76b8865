package tune

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// EventColumns is the header of a reference events file.
const EventColumns = "device,start_s,end_s,label"

// ReadEventsCSV reads annotated reference events: device,start_s,end_s,label
// with a header row (label optional; other columns ignored). Times are
// seconds on the trend's clock; end_s must be after start_s. Errors name the
// line, the column and the bound.
func ReadEventsCSV(r io.Reader) ([]Event, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1
	cr.Comment = '#'
	head, err := cr.Read()
	if err != nil {
		if errors.Is(err, io.EOF) {
			return nil, fmt.Errorf("events csv: empty input, want a header row %s", EventColumns)
		}
		return nil, fmt.Errorf("events csv: header: %w", err)
	}
	col := map[string]int{}
	for i, h := range head {
		col[strings.TrimSpace(strings.TrimPrefix(h, "\ufeff"))] = i
	}
	for _, need := range []string{"device", "start_s", "end_s"} {
		if _, ok := col[need]; !ok {
			return nil, fmt.Errorf("events csv: header: no %s column, want %s", need, EventColumns)
		}
	}
	var out []Event
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			return out, nil
		}
		if err != nil {
			return nil, fmt.Errorf("events csv: %w", err)
		}
		line, _ := cr.FieldPos(0)
		cell := func(name string) string {
			if i, ok := col[name]; ok && i < len(rec) {
				return strings.TrimSpace(rec[i])
			}
			return ""
		}
		var ev Event
		ev.Device, ev.Label = cell("device"), cell("label")
		for _, f := range []struct {
			name string
			dst  *float64
		}{{"start_s", &ev.Start}, {"end_s", &ev.End}} {
			c := cell(f.name)
			v, err := strconv.ParseFloat(c, 64)
			if err != nil || !finite(v) {
				return nil, fmt.Errorf("events csv: line %d: %s %q, want a finite number of seconds", line, f.name, c)
			}
			*f.dst = v
		}
		if !(ev.End > ev.Start) {
			return nil, fmt.Errorf("events csv: line %d: end_s %s, want after start_s %s", line, cell("end_s"), cell("start_s"))
		}
		out = append(out, ev)
	}
}

// RuleEvents finds the reference events of one trend by rule: an event
// starts at the first valid sample with SpO2 < r.Below and ends at the next
// valid sample with SpO2 >= r.Below (or at the last sample when none
// follows); missing values change nothing. It counts when end - start >=
// r.For. Valid means SpO2 in (0, 100], as in the alarm engine.
func RuleEvents(device string, samples []alarms.Sample, r Rule) []Event {
	var out []Event
	need := r.For.Seconds()
	start := 0.0
	in := false
	last := 0.0
	for i := range samples {
		s := &samples[i]
		last = s.T
		v := s.SpO2
		if !(v > 0 && v <= 100) {
			continue
		}
		switch {
		case !in && v < r.Below:
			in, start = true, s.T
		case in && v >= r.Below:
			in = false
			if s.T-start >= need-1e-6 {
				out = append(out, Event{Device: device, Start: start, End: s.T, Label: "rule"})
			}
		}
	}
	if in && last-start >= need-1e-6 {
		out = append(out, Event{Device: device, Start: start, End: last, Label: "rule"})
	}
	return out
}
