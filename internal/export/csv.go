package export

import (
	"bufio"
	"fmt"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"io"
	"math"
	"strconv"
	"strings"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// CSVHeader is the CSV export's header: the replay/tune trend columns
// (docs/contracts.md, "CSV formats") first, then ratio of ratios, estimator
// flags, the source of the values (gateway estimate or device summary) and
// the participant enrolled to the device at that time (empty when none).
// It follows the caution comment line (caution.Comment), which every
// pulsefleet CSV reader skips.
const CSVHeader = "t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi,ratio,flags,source,participant"

// CSVWriter writes trend points as CSV, one row per point, with an empty cell
// for every missing value. t_s is Unix seconds with millisecond resolution.
type CSVWriter struct {
	w      *bufio.Writer
	line   []byte
	dev    string // device of the cached field
	devCSV []byte // dev as a CSV field
	pid    string // participant of the next points (ParticipantWriter)
	closed bool
	notes  []string // "# incomplete:" lines written after the caution (SetIncomplete)
}

// NewCSVWriter returns a CSVWriter writing to w (buffered; Close flushes).
func NewCSVWriter(w io.Writer) *CSVWriter {
	return &CSVWriter{w: bufio.NewWriterSize(w, 64<<10), line: make([]byte, 0, 128)}
}

// SetIncomplete marks the export as lacking history: Begin writes each note
// as a comment line "# incomplete: NOTE" after the caution line, before
// the header (comment lines are skipped by every pulsefleet CSV reader, so
// the file still replays). Call it before Begin.
func (c *CSVWriter) SetIncomplete(notes []string) { c.notes = notes }

// Begin writes the header row.
func (c *CSVWriter) Begin([]store.Device) error {
	if c.closed {
		return errClosed
	}
	head := caution.Comment
	for _, n := range c.notes {
		head += "# incomplete: " + strings.NewReplacer("\n", " ", "\r", " ").Replace(n) + "\n"
	}
	if _, err := c.w.WriteString(head + CSVHeader + "\n"); err != nil {
		return fmt.Errorf("csv: %w", err)
	}
	return nil
}

// Point writes one row.
func (c *CSVWriter) Point(p *store.Point) error {
	if c.closed {
		return errClosed
	}
	if p.Device != c.dev || c.devCSV == nil {
		c.dev, c.devCSV = p.Device, appendCSVField(nil, p.Device)
	}
	b := appendSeconds(c.line[:0], p.TimeMS)
	b = append(b, ',')
	b = append(b, c.devCSV...)
	for _, v := range [...]float64{p.SpO2, p.Pulse, p.PI, p.SQI, p.Ratio} {
		b = append(b, ',')
		b = appendValue(b, v)
	}
	b = append(b, ',')
	b = strconv.AppendUint(b, uint64(p.Flags), 10)
	b = append(b, ',')
	b = append(b, sourceName(p.Source)...)
	b = append(b, ',')
	b = append(b, c.pid...) // participant ids need no quoting (participants.CheckID)
	b = append(b, '\n')
	c.line = b
	if _, err := c.w.Write(b); err != nil {
		return fmt.Errorf("csv: %w", err)
	}
	return nil
}

// Participant sets the participant column of the rows that follow.
func (c *CSVWriter) Participant(pid string) error {
	c.pid = pid
	return nil
}

// Close flushes the buffer.
func (c *CSVWriter) Close() error {
	if c.closed {
		return errClosed
	}
	c.closed = true
	if err := c.w.Flush(); err != nil {
		return fmt.Errorf("csv: %w", err)
	}
	return nil
}

// sourceName names Point.Source.
func sourceName(s uint8) string {
	switch s {
	case 1:
		return "gateway"
	case 2:
		return "device"
	}
	return ""
}

// appendSeconds appends ms as decimal seconds without trailing zeros
// (1700000000123 -> 1700000000.123, 1700000001000 -> 1700000001).
func appendSeconds(b []byte, ms int64) []byte {
	if ms < 0 {
		return strconv.AppendFloat(b, float64(ms)/1000, 'f', -1, 64)
	}
	b = strconv.AppendInt(b, ms/1000, 10)
	frac := ms % 1000
	if frac == 0 {
		return b
	}
	d := [3]byte{byte('0' + frac/100), byte('0' + frac/10%10), byte('0' + frac%10)}
	n := 3
	for d[n-1] == '0' {
		n--
	}
	b = append(b, '.')
	return append(b, d[:n]...)
}

// appendValue appends a stored (float32) value in the shortest form that
// reads back to the same float32; nothing for NaN or ±Inf (missing).
func appendValue(b []byte, v float64) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return b
	}
	return strconv.AppendFloat(b, v, 'f', -1, 32)
}

// appendCSVField appends s quoted as RFC 4180 asks when it holds a comma,
// quote, line break or leading space (encoding/csv's rule).
func appendCSVField(b []byte, s string) []byte {
	if s == "" || !(strings.ContainsAny(s, ",\"\r\n") || s[0] == ' ' || s[0] == '\t') {
		return append(b, s...)
	}
	b = append(b, '"')
	for i := 0; i < len(s); i++ {
		if s[i] == '"' {
			b = append(b, '"')
		}
		b = append(b, s[i])
	}
	return append(b, '"')
}
