package relay

import (
	"bytes"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// Format is what each line carries.
type Format int

const (
	// Raw lines carry one sample of each channel (red, ir[, ambient]).
	Raw Format = iota
	// Summary lines carry values the device computed (spo2, pulse, pi[, sqi]),
	// one line per second.
	Summary
)

// Reasons a line is rejected.
const (
	ReasonFields  = "fields"              // not as many fields as columns
	ReasonNumber  = "not_a_number"        // a field is not a finite number
	ReasonRange   = "out_of_range"        // a value outside its bound (ADC range, 0..100 %, ...)
	ReasonTime    = "time_not_increasing" // t_s/t_ms not above the previous line's
	ReasonTooLong = "too_long"            // longer than MaxLineBytes
	ReasonFull    = "buffer_full"         // read while the held data was at its bound (live sources)
)

// MaxLineBytes bounds one line.
const MaxLineBytes = 1024

// Column roles.
const (
	colRed = iota
	colIR
	colAmbient
	colSpO2
	colPulse
	colPI
	colSQI
	colTS
	colTMS
	nCols
)

var colNames = map[string]int{
	"red": colRed, "ir": colIR, "ambient": colAmbient, "amb": colAmbient,
	"spo2": colSpO2, "spo2_pct": colSpO2, "pulse": colPulse, "pulse_bpm": colPulse,
	"pi": colPI, "pi_pct": colPI, "sqi": colSQI, "quality": colSQI,
	"t_s": colTS, "t_ms": colTMS,
}

// Sample is one accepted line.
type Sample struct {
	Red, IR, Ambient   uint32  // raw: ADC codes
	HasAmbient         bool    //
	SpO2, Pulse, PI, Q float64 // summary: NaN when the device gave none
	TimeMS             float64 // t_s x 1000 or t_ms; NaN without a time column
	Restart            bool    // the time column went back by more than a second: the device restarted
}

// Parser reads lines of one format. Not safe for concurrent use.
type Parser struct {
	format  Format
	maxCode float64
	idx     [nCols]int // field index of each role, -1 if absent
	nFields int
	started bool // header seen or columns applied
	lastT   float64
	fields  [][]byte
}

// NewParser returns a parser. columns names the fields of a line when the
// input has no header (nil: red,ir or spo2,pulse,pi); adcBits bounds raw
// codes (0..2^adcBits-1).
func NewParser(format Format, columns []string, adcBits int) (*Parser, error) {
	p := &Parser{format: format, maxCode: math.Ldexp(1, adcBits) - 1, lastT: math.NaN()}
	if columns == nil {
		columns = []string{"red", "ir"}
		if format == Summary {
			columns = []string{"spo2", "pulse", "pi"}
		}
	}
	if err := p.setColumns(columns, true); err != nil {
		return nil, fmt.Errorf("--columns: %w", err)
	}
	p.started = false
	return p, nil
}

// setColumns maps names to roles; strict rejects unknown names.
func (p *Parser) setColumns(names []string, strict bool) error {
	for i := range p.idx {
		p.idx[i] = -1
	}
	for i, n := range names {
		n = strings.ToLower(strings.TrimSpace(strings.TrimPrefix(n, "\ufeff")))
		r, ok := colNames[n]
		if !ok || (n == "_") {
			if strict && n != "_" {
				return fmt.Errorf("unknown column %q, want red, ir, ambient, spo2, pulse, pi, sqi, t_s, t_ms or _ (ignored)", n)
			}
			continue
		}
		if p.idx[r] < 0 {
			p.idx[r] = i
		}
	}
	p.nFields = len(names)
	if p.idx[colTS] >= 0 && p.idx[colTMS] >= 0 {
		p.idx[colTMS] = -1
	}
	need := []int{colRed, colIR}
	what := "red and ir"
	if p.format == Summary {
		need, what = []int{colSpO2}, "spo2"
	}
	for _, r := range need {
		if p.idx[r] < 0 {
			return fmt.Errorf("columns %q: want at least %s", strings.Join(names, ","), what)
		}
	}
	p.started = true
	return nil
}

// HasTime reports whether lines carry a time column.
func (p *Parser) HasTime() bool { return p.idx[colTS] >= 0 || p.idx[colTMS] >= 0 }

// Parse reads one line (without its newline). It returns header true for a
// first line of column names (err is then about a header that lacks a
// needed column, which ends the input); otherwise a sample, or the reason
// the line is rejected. Empty lines and comments (starting with #) give
// reason "" and ok false: skip them.
func (p *Parser) Parse(line []byte) (s Sample, ok bool, reason string, header bool, err error) {
	line = bytes.TrimSpace(line)
	if len(line) == 0 || line[0] == '#' {
		return s, false, "", false, nil // empty, or a comment (a debug print, a caution line)
	}
	if len(line) > MaxLineBytes {
		return s, false, ReasonTooLong, false, nil
	}
	p.split(line)
	if !p.started {
		if !allNumbers(p.fields) {
			names := make([]string, len(p.fields))
			known := false
			for i, f := range p.fields {
				names[i] = string(f)
				_, ok := colNames[strings.ToLower(strings.TrimSpace(strings.TrimPrefix(names[i], "\ufeff")))]
				known = known || ok
			}
			if !known {
				// A boot banner or other chatter before the header or
				// the first sample: rejected, and the next line may
				// still be the header.
				return s, false, ReasonNumber, false, nil
			}
			if err := p.setColumns(names, false); err != nil {
				return s, false, "", true, fmt.Errorf("header: %w", err)
			}
			return s, false, "", true, nil
		}
		p.started = true
	}
	if len(p.fields) != p.nFields {
		return s, false, ReasonFields, false, nil
	}
	s.TimeMS = math.NaN()
	if p.idx[colTS] >= 0 || p.idx[colTMS] >= 0 {
		r, scale := colTS, 1000.0
		if p.idx[colTS] < 0 {
			r, scale = colTMS, 1
		}
		v, why := p.num(r, false)
		if why != "" {
			return s, false, why, false, nil
		}
		s.TimeMS = v * scale
	}
	why := ""
	if p.format == Raw {
		why = p.raw(&s)
	} else {
		why = p.summary(&s)
	}
	if why != "" {
		return s, false, why, false, nil
	}
	if !math.IsNaN(s.TimeMS) {
		if !math.IsNaN(p.lastT) {
			switch {
			case s.TimeMS < p.lastT-1000:
				s.Restart = true
			case s.TimeMS <= p.lastT:
				return s, false, ReasonTime, false, nil
			}
		}
		p.lastT = s.TimeMS
	}
	return s, true, "", false, nil
}

// num reads column r of the split line: NaN when the input has no such
// column (or, with empty, when the field is empty), else a finite number or
// the reject reason.
func (p *Parser) num(r int, empty bool) (float64, string) {
	i := p.idx[r]
	if i < 0 {
		return math.NaN(), ""
	}
	f := p.fields[i]
	if len(f) == 0 && empty {
		return math.NaN(), ""
	}
	v, err := strconv.ParseFloat(string(f), 64)
	if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, ReasonNumber
	}
	return v, ""
}

// raw reads a raw sample's converter codes into s, or returns the reject
// reason (a code outside 0..2^adcBits-1 is out of range).
func (p *Parser) raw(s *Sample) string {
	var codes [3]uint32
	for i, r := range []int{colRed, colIR, colAmbient} {
		v, why := p.num(r, false)
		if why != "" {
			return why
		}
		if math.IsNaN(v) {
			continue
		}
		v = math.Round(v)
		if v < 0 || v > p.maxCode {
			return ReasonRange
		}
		codes[i] = uint32(v)
	}
	s.Red, s.IR, s.Ambient, s.HasAmbient = codes[0], codes[1], codes[2], p.idx[colAmbient] >= 0
	return ""
}

// summary reads a summary line's values into s, each empty or within its
// bounds, or returns the reject reason.
func (p *Parser) summary(s *Sample) string {
	bounds := [...]struct {
		r      int
		lo, hi float64
		dst    *float64
	}{{colSpO2, 0, 100, &s.SpO2}, {colPulse, 0, 350, &s.Pulse}, {colPI, 0, 100, &s.PI}, {colSQI, 0, 1, &s.Q}}
	for _, b := range bounds {
		v, why := p.num(b.r, true)
		if why != "" {
			return why
		}
		if !math.IsNaN(v) && (v < b.lo || v > b.hi) {
			return ReasonRange
		}
		*b.dst = v
	}
	return ""
}

// split cuts a line into fields: by commas if it has any, else semicolons,
// else tabs, else runs of spaces.
func (p *Parser) split(line []byte) {
	p.fields = p.fields[:0]
	var sep byte
	for _, c := range []byte{',', ';', '\t'} {
		if bytes.IndexByte(line, c) >= 0 {
			sep = c
			break
		}
	}
	if sep == 0 {
		p.fields = append(p.fields, bytes.Fields(line)...)
		return
	}
	for {
		i := bytes.IndexByte(line, sep)
		if i < 0 {
			p.fields = append(p.fields, bytes.TrimSpace(line))
			return
		}
		p.fields = append(p.fields, bytes.TrimSpace(line[:i]))
		line = line[i+1:]
	}
}

func allNumbers(fields [][]byte) bool {
	for _, f := range fields {
		if len(f) == 0 {
			continue
		}
		if _, err := strconv.ParseFloat(string(f), 64); err != nil {
			return false
		}
	}
	return true
}
