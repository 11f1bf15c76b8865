package main

import (
	"fmt"
	"io"
	"os"
	"sort"
	"strings"
	"sync"
	"time"

	"github.com/pulsefleet/pulsefleet/uplink"
	"golang.org/x/term"
)

func orNone(s string) string {
	if s == "" {
		return "none"
	}
	return s
}

func (r *relayRun) report(st uplink.Stats) relayReport {
	rej := map[string]uint64{}
	var n uint64
	for k, v := range r.rejects {
		rej[k] += v
		n += v
	}
	for k, v := range st.Rejections {
		rej["gateway "+k] += v
		n += v
	}
	return relayReport{Device: r.o.device, LinesRead: r.read, LinesRejected: n, SamplesSent: st.SamplesSent,
		SamplesAcked: st.SamplesAcked, Reconnects: st.Reconnects, SpooledMax: st.HeldMaxSamples, SpooledMaxB: st.HeldMaxBytes,
		FromSpool: r.fromSp, Unacked: st.HeldSamples + int64(r.dropped), RejectedReason: rej, Gaps: r.asm.Gaps(), Redirects: st.Redirects,
		RateHz: r.asm.RateHz(), Caution: relayCaution}
}

// progressLine is the one-line state for a terminal.
func (r *relayRun) progressLine() string {
	st := r.client.Stats()
	conn := "connecting"
	if st.Connected {
		conn = "connected"
	}
	line := fmt.Sprintf("relay %s: %d lines read, %d samples acknowledged, %d held, %s", r.o.device, r.read, st.SamplesAcked, st.HeldSamples, conn)
	if len(r.rejects) > 0 || len(st.Rejections) > 0 {
		all := map[string]uint64{}
		for k, v := range r.rejects {
			all[k] = v
		}
		for k, v := range st.Rejections {
			all["gateway "+k] = v
		}
		line += "; rejected: " + reasons(all)
	}
	return line
}

// reasons formats counts by reason, largest first.
func reasons(m map[string]uint64) string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Slice(keys, func(i, j int) bool {
		if m[keys[i]] != m[keys[j]] {
			return m[keys[i]] > m[keys[j]]
		}
		return keys[i] < keys[j]
	})
	parts := make([]string, len(keys))
	for i, k := range keys {
		parts[i] = fmt.Sprintf("%s %d", k, m[k])
	}
	return strings.Join(parts, ", ")
}

// statusPrinter writes event lines, and on a terminal a progress line that
// is rewritten in place at most once a second.
type statusPrinter struct {
	mu       sync.Mutex
	w        io.Writer
	tty      bool
	shown    bool
	last     time.Time
	lastLine string
}

func newStatusPrinter(w io.Writer) *statusPrinter {
	p := &statusPrinter{w: w}
	if f, ok := w.(*os.File); ok && term.IsTerminal(int(f.Fd())) {
		p.tty = true
	}
	return p
}

func (p *statusPrinter) logf(format string, args ...any) {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.shown {
		fmt.Fprint(p.w, "\r\033[K")
	}
	fmt.Fprintf(p.w, "relay: "+format+"\n", args...)
	if p.shown {
		fmt.Fprint(p.w, p.lastLine)
	}
}

func (p *statusPrinter) progress(line string) {
	if !p.tty {
		return
	}
	p.mu.Lock()
	defer p.mu.Unlock()
	if time.Since(p.last) < time.Second {
		return
	}
	p.last, p.lastLine, p.shown = time.Now(), line, true
	fmt.Fprint(p.w, "\r\033[K"+line)
}

func (p *statusPrinter) done() {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.shown {
		fmt.Fprintln(p.w)
		p.shown = false
	}
}
