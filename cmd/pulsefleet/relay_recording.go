package main

import (
	"context"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/relay"
)

// pace holds a --realtime recording to its own clock.
func (r *relayRun) pace(ctx context.Context) {
	m := r.asm.Mark()
	if r.t0Wall.IsZero() {
		r.t0Wall, r.t0Dev = time.Now(), m.LastMS
		return
	}
	due := r.t0Wall.Add(time.Duration((m.LastMS - r.t0Dev) * float64(time.Millisecond)))
	if d := time.Until(due); d > 0 {
		t := time.NewTimer(d)
		select {
		case <-ctx.Done():
		case <-t.C:
		}
		t.Stop()
	}
}

// anchor places a recording so that its last sample is now (the gateway
// refuses device times ahead of its clock): it reads the file once to
// measure its span. Standard input that cannot be rewound starts now.
func (r *relayRun) anchor(format relay.Format) (float64, error) {
	now := float64(time.Now().UnixMilli())
	var in io.Reader
	if r.input != "" {
		fh, err := os.Open(r.input)
		if err != nil {
			return 0, fmt.Errorf("--in: %w", err)
		}
		defer fh.Close()
		in = fh
	} else if rs, ok := r.s.in.(io.ReadSeeker); ok && !r.o.realtime {
		// Standard input redirected from a file: measure it, then rewind.
		start, err := rs.Seek(0, io.SeekCurrent)
		if err != nil {
			return now, nil
		}
		defer rs.Seek(start, io.SeekStart)
		in = rs
	} else {
		return now, nil
	}
	p, err := relay.NewParser(format, r.columns(), r.o.adcBits)
	if err != nil {
		return 0, usageError{err.Error()}
	}
	rate := r.o.rate
	if format == relay.Summary && rate == 0 {
		rate = 1
	}
	var n int
	first, last := math.NaN(), math.NaN()
	span := 0.0
	err = relay.EachLine(in, func(line []byte) {
		s, ok, _, _, _ := p.Parse(line)
		if !ok {
			return
		}
		n++
		if !math.IsNaN(s.TimeMS) {
			if s.Restart && !math.IsNaN(last) {
				span += last - first
				first = s.TimeMS
			}
			if math.IsNaN(first) {
				first = s.TimeMS
			}
			last = s.TimeMS
		}
	})
	if err != nil {
		return 0, fmt.Errorf("read %s: %w", r.input, err)
	}
	switch {
	case !math.IsNaN(first):
		span += last - first // (an absolute time column keeps its own times)
	case rate > 0 && n > 0:
		span = float64(n-1) * 1000 / rate
	}
	period := 10.0
	if rate > 0 {
		period = 1000 / rate
	}
	return now - span - period, nil
}

func (r *relayRun) columns() []string {
	if r.o.columns == "" {
		return nil
	}
	return strings.Split(r.o.columns, ",")
}

// readHeader feeds the first line of a resumed file to the parser, so a
// header names the columns as in the first run.
func (r *relayRun) readHeader(path string) error {
	fh, err := os.Open(path)
	if err != nil {
		return fmt.Errorf("--in: %w", err)
	}
	defer fh.Close()
	var first []byte
	relay.EachLine(io.LimitReader(fh, 64<<10), func(line []byte) {
		if first == nil && len(strings.TrimSpace(string(line))) > 0 {
			first = append([]byte(nil), line...)
		}
	})
	if first != nil {
		if _, _, _, _, err := r.parser.Parse(first); err != nil {
			return fmt.Errorf("%s: %w", path, err)
		}
	}
	return nil
}
