package main

import (
	"bytes"
	"encoding/csv"
	"fmt"
	"io"
	"math"
	"strconv"
	"time"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/participants"
)

// participantRows keeps the header and the rows of a trend CSV whose
// participant column is pid (what `trend --participant` and `export --format
// csv` write): the participant's stitched history, ready for
// alarms.ReadTrendCSV. Comment lines are dropped.
func participantRows(in io.Reader, name, pid string) (io.Reader, int, error) {
	cr := csv.NewReader(in)
	cr.Comment = '#'
	cr.FieldsPerRecord = -1
	head, err := cr.Read()
	if err != nil {
		return nil, 0, fmt.Errorf("%s: header: %w", name, err)
	}
	col := -1
	for i, h := range head {
		if h == "participant" {
			col = i
		}
	}
	if col < 0 {
		return nil, 0, fmt.Errorf("%s: --participant: the trend has no participant column; write it with `pulsefleet trend --participant` or `pulsefleet export --format csv`", name)
	}
	var buf bytes.Buffer
	cw := csv.NewWriter(&buf)
	cw.Write(head)
	n := 0
	for {
		rec, err := cr.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, 0, fmt.Errorf("%s: %w", name, err)
		}
		if col < len(rec) && rec[col] == pid {
			cw.Write(rec)
			n++
		}
	}
	cw.Flush()
	return &buf, n, cw.Error()
}

// nightIndices is one row of the per-participant-night summary.
type nightIndices struct {
	participant, night string
	alarms.DeviceIndices
}

// participantNightIndices scores each device's samples inside each night
// of window w separately (a prototype and a reference oximeter worn at
// once are two rows, never mixed).
func participantNightIndices(pid string, trends []alarms.Trend, w participants.NightWindow, opt alarms.IndexOptions) ([]nightIndices, error) {
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, tr := range trends {
		if n := len(tr.Samples); n > 0 {
			lo, hi = math.Min(lo, tr.Samples[0].T), math.Max(hi, tr.Samples[n-1].T)
		}
	}
	if math.IsInf(lo, 1) {
		return nil, nil
	}
	var out []nightIndices
	for _, n := range w.Nights(int64(lo*1000), int64(hi*1000)+1) {
		var inNight []alarms.Trend
		for _, tr := range trends {
			cut := alarms.Trend{Device: tr.Device}
			for _, s := range tr.Samples {
				if ms := int64(math.Round(s.T * 1000)); ms >= n.FromMS && ms < n.ToMS {
					cut.Samples = append(cut.Samples, s)
				}
			}
			if len(cut.Samples) > 0 {
				inNight = append(inNight, cut)
			}
		}
		rows, err := alarms.TrendIndices(inNight, opt)
		if err != nil {
			return nil, err
		}
		for _, r := range rows {
			out = append(out, nightIndices{participant: pid, night: n.Date, DeviceIndices: r})
		}
	}
	return out, nil
}

// nightIndexColumns is the header of writeNightIndices: the participant
// and the night (local date it starts on), then replay --indices' columns.
const nightIndexColumns = "participant,night,night_from,night_to," + alarms.IndexColumns

func writeNightIndices(w io.Writer, rows []nightIndices, win participants.NightWindow) error {
	f := func(v float64, prec int) string {
		if v != v {
			return ""
		}
		return strconv.FormatFloat(v, 'f', prec, 64)
	}
	fmt.Fprintf(w, "# night window %s\n", win)
	cw := csv.NewWriter(w)
	cw.Write(splitHeader(nightIndexColumns))
	for _, r := range rows {
		cw.Write([]string{r.participant, r.night, nightBound(win, r.night, true), nightBound(win, r.night, false),
			r.Device, f(r.ODI3.ValidHours, 3), strconv.Itoa(r.ODI3.Events), f(r.ODI3.ODIPerHour, 2),
			strconv.Itoa(r.ODI4.Events), f(r.ODI4.ODIPerHour, 2), f(r.ODI3.T90Pct, 2)})
	}
	cw.Flush()
	return cw.Error()
}

// nightBound gives the start (or end) of the night named date in RFC 3339 with its offset.
func nightBound(w participants.NightWindow, date string, start bool) string {
	d, err := time.ParseInLocation("2006-01-02", date, w.Loc)
	if err != nil {
		return ""
	}
	noon := d.Add(12 * time.Hour).UnixMilli()
	for _, n := range w.Nights(noon-12*3_600_000, noon+12*3_600_000) {
		if n.Date == date {
			if start {
				return time.UnixMilli(n.FromMS).In(w.Loc).Format(time.RFC3339)
			}
			return time.UnixMilli(n.ToMS).In(w.Loc).Format(time.RFC3339)
		}
	}
	return ""
}

func splitHeader(h string) []string {
	r := csv.NewReader(bytes.NewReader([]byte(h)))
	rec, _ := r.Read()
	return rec
}
