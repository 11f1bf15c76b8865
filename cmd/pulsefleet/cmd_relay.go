package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/relay"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/uplink"
)

const relaySynopsis = "--gateway ADDR --device ID --model NAME (--serial PATH [--baud N] | --tcp HOST:PORT | --listen HOST:PORT | --in FILE|-) [--rate HZ] [--format csv|summary] [--columns LIST] [--adc-bits N] [--spool DIR] [--token T | --ca/--cert/--key]"

// Bounds of what the relay holds unacknowledged (flags --spool-max and
// --memory-max, in MiB).
const (
	defaultSpoolMaxMiB  = 256
	defaultMemoryMaxMiB = 64
	// chunkLatency: a live source's samples wait at most this long to be sent.
	chunkLatency = 250 * time.Millisecond
	// stopGrace: after an interrupt, how long the relay waits for the last
	// acknowledgements before it exits.
	stopGrace = 5 * time.Second
)

func init() {
	register(command{
		name: "relay",
		summary: `Stream a prototype's text lines (serial port, TCP, file) to a gateway as one device.
It reads one sample per line from a serial port, a TCP connection, a file or
standard input and gives them the simulator's delivery guarantees: numbered
messages, a resend buffer, resume from the gateway's acknowledged sequence,
redirects, reconnects with exponential backoff and jitter.

Lines: red,ir[,ambient] samples (--format csv) or spo2,pulse,pi[,sqi] once a
second (--format summary), separated by commas, semicolons, tabs or spaces;
an optional header line names the columns, else --columns does. A t_s or t_ms
column time-stamps samples; without one they are stamped by --rate from the
first sample. Lines starting with # are comments. A bad line is counted by
reason and skipped. See
docs/device-protocol.md for the line format and the protocol underneath.

With --spool DIR unacknowledged data is kept on disk (at most --spool-max MiB)
so a gateway outage or a relay restart loses nothing; without it the relay
holds at most --memory-max MiB in memory. A recording (--in FILE) is sent as
fast as the gateway acknowledges, placed so it ends at the current time,
unless --realtime. When the input ends the relay waits (up to --drain) until
everything read is acknowledged, then prints one JSON line:
{"device":..,"lines_read":N,"lines_rejected":N,"samples_sent":N,"samples_acked":N,"reconnects":N,"spooled_max":N,...}
It exits 1 if anything read was neither acknowledged nor rejected with a
reason, or if the gateway refused data. Research tool, NOT a medical device.`,
		run: runRelay,
	})
}

// relayOptions are the flags of 'relay'.
type relayOptions struct {
	gateway, device, model, firmware string
	serial, tcp, listen, in          string
	baud, adcBits                    int
	rate, redNM, irNM                float64
	format, columns, calibration     string
	spool                            string
	spoolMaxMiB, memoryMaxMiB        int
	token, caFile, certFile, keyFile string
	realtime                         bool
	drain                            time.Duration
	listenBound                      func(addr string) // tests: the --listen address
}

func runRelay(ctx context.Context, args []string, s stdio) error {
	fs := newFlagSet("relay", relaySynopsis, s.err)
	var o relayOptions
	o.register(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	return o.run(ctx, s)
}

func (o *relayOptions) register(fs *flag.FlagSet) {
	fs.StringVar(&o.gateway, "gateway", "", "gRPC address of the gateway, host:port (required); redirects in a sharded fleet are followed")
	fs.StringVar(&o.device, "device", "", "device id to stream as: 1..64 of A-Z a-z 0-9 . _ - (required)")
	fs.StringVar(&o.model, "model", "", "hardware model, 0..64 characters, e.g. proto-b; selects the model's calibration (required)")
	fs.StringVar(&o.firmware, "firmware", "relay", "firmware version string sent in the introduction")
	fs.StringVar(&o.serial, "serial", "", "serial port to read, e.g. /dev/ttyACM0 (reopened when it disappears)")
	fs.IntVar(&o.baud, "baud", 115200, "serial port speed, bits/s")
	fs.StringVar(&o.tcp, "tcp", "", "connect to HOST:PORT and read the lines the device prints there (reconnects)")
	fs.StringVar(&o.listen, "listen", "", "listen on HOST:PORT for the device to connect and print lines (a new connection replaces the old)")
	fs.StringVar(&o.in, "in", "", "read a recording from FILE, or - for standard input; ends when the input ends")
	fs.Float64Var(&o.rate, "rate", 0, "raw sample rate in Hz, 25..1000 (required unless lines have a t_s or t_ms column to infer it from); summary: lines per second, default 1")
	fs.StringVar(&o.format, "format", "csv", "csv: raw samples red,ir[,ambient] per line; summary: spo2,pulse,pi[,sqi] per line")
	fs.StringVar(&o.columns, "columns", "", "names of the fields when the input has no header (default red,ir or spo2,pulse,pi); known: red, ir, ambient, spo2, pulse, pi, sqi, t_s, t_ms, _ (ignored)")
	fs.IntVar(&o.adcBits, "adc-bits", 16, "converter resolution, 8..24: raw codes must lie in 0..2^N-1")
	fs.Float64Var(&o.redNM, "red-nm", 660, "first channel's wavelength, nm")
	fs.Float64Var(&o.irNM, "ir-nm", 940, "second channel's wavelength, nm")
	fs.StringVar(&o.calibration, "calibration", "", `calibration the device asks for ("name" or "name@vN"); empty: the gateway's assignment`)
	fs.StringVar(&o.spool, "spool", "", "keep unacknowledged data in DIR on disk (survives a gateway outage and a relay restart)")
	fs.IntVar(&o.spoolMaxMiB, "spool-max", defaultSpoolMaxMiB, "bound of the unacknowledged data in the spool, MiB (the spool file stays under this plus the larger of 8 MiB and a quarter of it); when reached a recording waits and a live source's lines are rejected as buffer_full")
	fs.IntVar(&o.memoryMaxMiB, "memory-max", defaultMemoryMaxMiB, "without --spool: bound of the unacknowledged data held in memory, MiB (lost if the relay stops)")
	fs.StringVar(&o.token, "token", "", "device bearer token (default: $PULSEFLEET_TOKEN)")
	fs.StringVar(&o.caFile, "ca", "", "CA certificate (PEM) to verify the gateway's TLS certificate; enables TLS")
	fs.StringVar(&o.certFile, "cert", "", "client certificate (PEM) for mutual TLS")
	fs.StringVar(&o.keyFile, "key", "", "client key (PEM) for mutual TLS")
	fs.BoolVar(&o.realtime, "realtime", false, "--in FILE: send at the recording's own pace instead of as fast as acknowledgements allow")
	fs.DurationVar(&o.drain, "drain", 10*time.Minute, "when the input ends, wait at most this long for the last acknowledgements")
}

// relayReport is the JSON line of 'relay'.
type relayReport struct {
	Device         string            `json:"device"`
	LinesRead      uint64            `json:"lines_read"`
	LinesRejected  uint64            `json:"lines_rejected"`
	SamplesSent    uint64            `json:"samples_sent"`
	SamplesAcked   uint64            `json:"samples_acked"`
	Reconnects     uint64            `json:"reconnects"`
	SpooledMax     int64             `json:"spooled_max"`
	SpooledMaxB    int64             `json:"spooled_max_bytes"`
	FromSpool      uint64            `json:"lines_from_spool"`
	Unacked        int64             `json:"unacked"`
	RejectedReason map[string]uint64 `json:"rejected_by_reason"`
	Gaps           int               `json:"gaps"`
	Redirects      uint64            `json:"redirects"`
	RateHz         float64           `json:"rate_hz"`
	Caution        string            `json:"caution"`
}

const relayCaution = caution.Text

// check validates the flags and returns the source.
func (o *relayOptions) check(s stdio, logf func(string, ...any)) (relay.Source, relay.Format, error) {
	var src relay.Source
	n := 0
	for _, v := range []string{o.serial, o.tcp, o.listen, o.in} {
		if v != "" {
			n++
		}
	}
	format := relay.Raw
	switch {
	case o.gateway == "":
		return nil, 0, usagef("--gateway: required (host:port of a running gateway, e.g. from 'pulsefleet serve')")
	case o.device == "":
		return nil, 0, usagef("--device: required (the id to stream as)")
	case o.model == "":
		return nil, 0, usagef("--model: required (the prototype's hardware model, e.g. proto-b)")
	case len(o.model) > 64:
		return nil, 0, usagef("--model: %d characters, want 0..64", len(o.model))
	case n != 1:
		return nil, 0, usagef("want exactly one of --serial, --tcp, --listen and --in (got %d)", n)
	case o.format != "csv" && o.format != "summary":
		return nil, 0, usagef("--format %q, want csv or summary", o.format)
	case o.adcBits < 8 || o.adcBits > 24:
		return nil, 0, usagef("--adc-bits %d, want 8..24", o.adcBits)
	case o.baud < 50 || o.baud > 4000000:
		return nil, 0, usagef("--baud %d, want 50..4000000", o.baud)
	case o.spoolMaxMiB < 1 || o.spoolMaxMiB > 1<<20:
		return nil, 0, usagef("--spool-max %d MiB, want 1..1048576", o.spoolMaxMiB)
	case o.memoryMaxMiB < 1 || o.memoryMaxMiB > 1<<16:
		return nil, 0, usagef("--memory-max %d MiB, want 1..65536", o.memoryMaxMiB)
	case o.drain < 0:
		return nil, 0, usagef("--drain %v, want 0 or more", o.drain)
	case o.realtime && o.in == "":
		return nil, 0, usagef("--realtime: only with --in (live sources have their own pace)")
	}
	if err := validDeviceID(o.device); err != nil {
		return nil, 0, err
	}
	if o.format == "summary" {
		format = relay.Summary
		if o.rate != 0 && (o.rate < 0.01 || o.rate > 10) {
			return nil, 0, usagef("--rate %v lines/s, want 0.01..10 in summary mode (default 1)", o.rate)
		}
	} else if o.rate != 0 {
		if err := checkRate(o.rate, "--rate"); err != nil {
			return nil, 0, err
		}
	}
	switch {
	case o.serial != "":
		src = &relay.Serial{Path: o.serial, Baud: o.baud, Logf: logf}
	case o.tcp != "":
		src = &relay.TCP{Addr: o.tcp, Logf: logf}
	case o.listen != "":
		src = &relay.Listen{Addr: o.listen, Logf: logf, Bound: o.listenBound}
	case o.in == "-":
		live := true
		if f, ok := s.in.(*os.File); ok {
			if fi, err := f.Stat(); err == nil && fi.Mode().IsRegular() {
				live = false
			}
		} else {
			live = false // a reader handed in by a caller (tests): a recording
		}
		src = &relay.File{Path: "-", In: s.in, IsLive: live && !o.realtime}
	default:
		src = &relay.File{Path: o.in}
	}
	return src, format, nil
}

// validDeviceID checks --device as the gateway will.
func validDeviceID(id string) error {
	if len(id) < 1 || len(id) > 64 {
		return usagef("--device: length %d, want 1..64", len(id))
	}
	for i := 0; i < len(id); i++ {
		c := id[i]
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '.' || c == '_' || c == '-') {
			return usagef("--device: %q has character %q, want only A-Z a-z 0-9 . _ -", id, c)
		}
	}
	return nil
}

// relayMeta describes the owner of a spool.
type relayMeta struct {
	Device string `json:"device"`
	Format string `json:"format"`
}

// relayMark is what the spool keeps of the input after each message.
type relayMark struct {
	Input string     `json:"input"` // the --in file, else "" (a live source restarts where it is)
	Clock relay.Mark `json:"clock"`
}

// relayRun is one run of the command.
type relayRun struct {
	o       *relayOptions
	s       stdio
	out     *statusPrinter
	parser  *relay.Parser
	asm     *relay.Assembler
	client  *uplink.Client
	src     relay.Source
	live    bool
	input   string
	rejects map[string]uint64
	read    uint64
	fromSp  uint64
	dropped uint64    // read samples never handed to the client (it had stopped): counted as unacknowledged
	t0Wall  time.Time // --realtime: wall time of the first sample
	t0Dev   float64
}

func (o *relayOptions) run(ctx context.Context, s stdio) error {
	out := newStatusPrinter(s.err)
	src, format, err := o.check(s, out.logf)
	if err != nil {
		return err
	}
	var cols []string
	if o.columns != "" {
		cols = strings.Split(o.columns, ",")
	}
	parser, err := relay.NewParser(format, cols, o.adcBits)
	if err != nil {
		return usageError{err.Error()}
	}
	cf := clientFlags{token: o.token, caFile: o.caFile, certFile: o.certFile, keyFile: o.keyFile}
	if _, err := cf.dial(o.gateway); err != nil { // check the TLS files before anything is read
		return err
	}
	tok := o.token
	if tok == "" {
		tok = os.Getenv("PULSEFLEET_TOKEN")
	}
	mode := pb.Mode_MODE_RAW
	if format == relay.Summary {
		mode = pb.Mode_MODE_SUMMARY
	}
	intro := &pb.Introduction{DeviceId: o.device, Model: o.model, Firmware: o.firmware, RedWavelengthNm: o.redNM,
		IrWavelengthNm: o.irNM, AdcBits: uint32(o.adcBits), CalibrationId: o.calibration, Mode: mode,
		Labels: map[string]string{"via": "relay"}}
	meta, _ := json.Marshal(relayMeta{Device: o.device, Format: o.format})
	uo := uplink.Options{Address: o.gateway, Dial: cf.dial, Token: tok, Intro: intro, Logf: out.logf,
		MaxBytes: int64(o.memoryMaxMiB) << 20}
	if o.spool != "" {
		uo.SpoolDir, uo.SpoolMeta, uo.MaxBytes = o.spool, meta, int64(o.spoolMaxMiB)<<20
	}
	client, rec, err := uplink.New(uo)
	if err != nil {
		return err
	}
	r := &relayRun{o: o, s: s, out: out, parser: parser, client: client, src: src, live: src.Live(), rejects: map[string]uint64{}}
	if o.in != "" && o.in != "-" {
		r.input = o.in
	}
	var resume *relay.Mark
	if o.spool != "" {
		var m relayMeta
		if err := json.Unmarshal(rec.Meta, &m); err != nil || m.Device != o.device || m.Format != o.format {
			client.Close()
			return fmt.Errorf("--spool %s: it belongs to device %q (format %s), not %q (%s); use another directory", o.spool, m.Device, m.Format, o.device, o.format)
		}
		if rec.CutBytes > 0 {
			out.logf("spool %s: cut %d bytes of a write torn by a crash (never acknowledged, re-read from the input if it is a file)", o.spool, rec.CutBytes)
		}
		r.fromSp = uint64(rec.Samples)
		if rec.Messages > 0 {
			out.logf("spool %s: %d messages (%d samples) from an earlier run to deliver", o.spool, rec.Messages, rec.Samples)
		}
		var mk relayMark
		if rec.Mark != nil && json.Unmarshal(rec.Mark, &mk) == nil && r.input != "" && mk.Input == r.input && mk.Clock.Started {
			resume = &mk.Clock
			if f, ok := src.(*relay.File); ok {
				f.Offset = mk.Clock.Offset
			}
			out.logf("%s: going on after byte %d, where the spooled data ends", r.input, mk.Clock.Offset)
		}
	} else {
		out.logf("no --spool: up to %d MiB of unacknowledged data is held in memory and lost if the relay stops", o.memoryMaxMiB)
	}
	defer client.Close()
	return r.run(ctx, format, resume)
}

func (r *relayRun) run(ctx context.Context, format relay.Format, resume *relay.Mark) error {
	o := r.o
	if err := r.newAssembler(format, resume); err != nil {
		return err
	}

	runCtx, stopClient := context.WithCancel(context.WithoutCancel(ctx))
	var owned sync.WaitGroup
	owned.Add(1)
	go func() {
		defer owned.Done()
		r.client.Run(runCtx)
	}()
	defer func() {
		stopClient()
		owned.Wait()
	}()

	batches := make(chan relay.Batch, 8)
	srcErr := make(chan error, 1)
	srcCtx, stopSrc := context.WithCancel(ctx)
	defer stopSrc()
	owned.Add(1)
	go func() {
		defer owned.Done()
		defer close(batches)
		srcErr <- r.src.Run(srcCtx, batches)
	}()

	tick := time.NewTicker(100 * time.Millisecond)
	defer tick.Stop()
	var failure error
	ended := false
	for !ended && failure == nil {
		select {
		case b, ok := <-batches:
			if !ok {
				ended = true
				break
			}
			failure = r.batch(ctx, b)
		case now := <-tick.C:
			if err := r.client.Err(); err != nil {
				failure = err
				break
			}
			if r.asm.Due(now, chunkLatency) && (r.live || o.realtime) {
				failure = r.add(ctx, r.asm.Flush(false))
			}
			r.out.progress(r.progressLine())
		case <-ctx.Done():
			ended = true
		}
	}
	stopSrc()
	for range batches { // the source ends at once; drop what it still had
	}
	if failure == nil && ctx.Err() == nil {
		if err := <-srcErr; err != nil && !errors.Is(err, context.Canceled) {
			failure = err
		}
	}
	// What was read goes to the client (and its spool) even when stopping.
	if err := r.add(context.WithoutCancel(ctx), r.asm.Flush(true)); err != nil && failure == nil {
		failure = err
	}
	if failure == nil {
		failure = r.drain(ctx)
	}
	stopClient()
	owned.Wait()
	r.out.done()
	return r.finish(ctx, failure)
}

// newAssembler places the input in time and makes the assembler. A
// --realtime recording is stamped by its own clock from now on (and paced to
// it), not by when lines were read.
func (r *relayRun) newAssembler(format relay.Format, resume *relay.Mark) error {
	o := r.o
	ac := relay.AssemblerConfig{Format: format, RateHz: o.rate, Live: r.live, AnchorMS: float64(time.Now().UnixMilli())}
	if !ac.Live && !o.realtime && resume == nil {
		anchor, err := r.anchor(format)
		if err != nil {
			return err
		}
		ac.AnchorMS = anchor
	}
	if f, ok := r.src.(*relay.File); ok && f.Offset > 0 {
		if err := r.readHeader(f.Path); err != nil {
			return err
		}
	}
	r.asm = relay.NewAssembler(ac, resume)
	return nil
}

// drain waits for the last acknowledgements: up to --drain when the input
// ended, a short grace when the relay was told to stop (ctx done).
func (r *relayRun) drain(ctx context.Context) error {
	o := r.o
	dctx, cancel := context.WithTimeout(context.Background(), o.drain)
	if ctx.Err() != nil {
		dctx, cancel = context.WithTimeout(context.Background(), min(o.drain, stopGrace))
	}
	werr := r.client.Wait(dctx)
	cancel()
	if werr != nil && !errors.Is(werr, context.DeadlineExceeded) && !errors.Is(werr, context.Canceled) {
		return werr
	}
	return nil
}

// finish prints the JSON line and says whether the run did its job: it
// fails on an earlier failure, on samples left unacknowledged, and on
// samples the gateway refused.
func (r *relayRun) finish(ctx context.Context, failure error) error {
	o := r.o
	st := r.client.Stats()
	rep := r.report(st)
	if err := writeJSONLine(r.s, rep); err != nil {
		return err
	}
	switch {
	case failure != nil:
		return failure
	case rep.Unacked > 0:
		where := "they are lost (no --spool)"
		if o.spool != "" {
			where = "they stay in " + o.spool + " for the next run"
		}
		if ctx.Err() != nil && rep.Unacked > 0 {
			return fmt.Errorf("stopped with %d samples not acknowledged; %s", rep.Unacked, where)
		}
		return fmt.Errorf("%d samples not acknowledged within --drain %v (last error: %s); %s", rep.Unacked, o.drain, orNone(st.LastError), where)
	case st.SamplesRejected > 0:
		return fmt.Errorf("the gateway refused %d samples (%s)", st.SamplesRejected, reasons(st.Rejections))
	}
	return nil
}

// batch handles the lines of one batch.
func (r *relayRun) batch(ctx context.Context, b relay.Batch) error {
	if b.Break {
		if err := r.add(ctx, r.asm.Break()); err != nil {
			return err
		}
	}
	for _, l := range b.Lines {
		s, ok, reason, header, err := r.parser.Parse(l.Text)
		if err != nil {
			return fmt.Errorf("%s: %w", r.src, err)
		}
		switch {
		case l.Long:
			reason = relay.ReasonTooLong
		case l.Cut && !header:
			reason = relay.ReasonCut
		}
		if header && reason == "" {
			continue
		}
		if reason != "" {
			r.read++
			r.rejects[reason]++
			continue
		}
		if !ok {
			continue // an empty line
		}
		if !r.parser.HasTime() && r.asm.RateHz() == 0 {
			return usagef("--rate: required when lines have no t_s or t_ms column (%s)", r.src)
		}
		r.read++
		if err := r.add(ctx, r.asm.Add(s, l.Off, l.At)); err != nil {
			return err
		}
		if r.o.realtime {
			r.pace(ctx)
		}
	}
	return nil
}

// add hands chunks to the client. A recording waits for room; a live
// source's chunk is rejected as buffer_full when there is none.
func (r *relayRun) add(ctx context.Context, chunks []relay.Chunk) error {
	for i, c := range chunks {
		mark, _ := json.Marshal(relayMark{Input: r.input, Clock: c.Mark})
		err := r.client.Add(ctx, c.Msg, c.Samples, mark, !r.live)
		switch {
		case errors.Is(err, uplink.ErrFull):
			r.rejects[relay.ReasonFull] += uint64(c.Samples)
		case err != nil:
			for _, rest := range chunks[i:] {
				r.dropped += uint64(rest.Samples)
			}
			if ctx.Err() != nil {
				return nil
			}
			return err
		}
	}
	return nil
}
