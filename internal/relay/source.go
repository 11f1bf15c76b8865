package relay

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"os"
	"sync"
	"time"

	"go.bug.st/serial"
)

// Line is one line read from a source.
type Line struct {
	Text []byte    // without the line end
	Off  int64     // input bytes consumed through this line (files: its end offset)
	At   time.Time // when it was read
	Long bool      // longer than the read buffer: Text is cut (reject it as too long)
	Cut  bool      // the source went away in the middle of this line
}

// Batch is what a source hands over at once: the lines read so far, after
// a break in the source when Break is set (a reopened serial port, a new
// TCP connection).
type Batch struct {
	Lines []Line
	Break bool
}

// ReasonCut rejects a partial line left when a live source went away.
const ReasonCut = "cut_off"

// Source is where lines come from. Run sends batches until the input ends
// (nil), ctx ends (ctx's error) or the source fails for good.
type Source interface {
	Run(ctx context.Context, out chan<- Batch) error
	Live() bool     // lines arrive as a device prints them (not a recording)
	String() string // for messages
}

// scan reads lines from r until it fails, handing them over in batches:
// a batch goes out when the reader has nothing more buffered (so a live
// source's lines are not held back) or holds 512 lines. off is the offset
// of r's first byte. It returns the offset reached and the read error
// (io.EOF at the end of a recording).
func scan(ctx context.Context, r io.Reader, off int64, brk bool, out chan<- Batch) (int64, error) {
	br := bufio.NewReaderSize(r, 64<<10)
	var lines []Line
	send := func() error {
		if len(lines) == 0 && !brk {
			return nil
		}
		select {
		case out <- Batch{Lines: lines, Break: brk}:
		case <-ctx.Done():
			return ctx.Err()
		}
		lines, brk = nil, false
		return nil
	}
	long := false
	for {
		b, err := br.ReadSlice('\n')
		off += int64(len(b))
		switch {
		case err == bufio.ErrBufferFull:
			if !long {
				lines = append(lines, Line{Text: append([]byte(nil), b[:MaxLineBytes+1]...), Off: off, At: time.Now(), Long: true})
			}
			long = true
			continue
		case err == nil:
			if !long {
				lines = append(lines, Line{Text: append([]byte(nil), b[:len(b)-1]...), Off: off, At: time.Now()})
			} else {
				lines[len(lines)-1].Off = off
			}
			long = false
		case len(b) > 0 && !long:
			lines = append(lines, Line{Text: append([]byte(nil), b...), Off: off, At: time.Now(), Cut: !errors.Is(err, io.EOF)})
		}
		if err != nil || br.Buffered() == 0 || len(lines) >= 512 {
			if serr := send(); serr != nil {
				return off, serr
			}
		}
		if err != nil && err != bufio.ErrBufferFull {
			return off, err
		}
	}
}

// File reads a recording (a regular file or a pipe) from Offset on.
type File struct {
	Path   string    // "-" for In
	In     io.Reader // standard input
	Offset int64     // bytes to skip (a resumed run)
	IsLive bool      // standard input from a pipe or terminal
}

func (f *File) String() string {
	if f.Path == "-" {
		return "standard input"
	}
	return f.Path
}

// Live reports whether lines arrive as the device prints them.
func (f *File) Live() bool { return f.IsLive }

// Run reads the file to its end.
func (f *File) Run(ctx context.Context, out chan<- Batch) error {
	r := f.In
	if f.Path != "-" {
		fh, err := os.Open(f.Path)
		if err != nil {
			return fmt.Errorf("--in: %w", err)
		}
		defer fh.Close()
		if f.Offset > 0 {
			if _, err := fh.Seek(f.Offset, io.SeekStart); err != nil {
				return fmt.Errorf("--in %s: %w", f.Path, err)
			}
		}
		r = fh
	}
	_, err := scan(ctx, r, f.Offset, false, out)
	if errors.Is(err, io.EOF) {
		return nil
	}
	if ctx.Err() == nil { // scan always ends with an error
		return fmt.Errorf("read %s: %w", f, err)
	}
	return err
}

// reopener runs a live source that can go away: open, read until it
// fails, say so, wait and open again, until ctx ends.
type reopener struct {
	name   string
	open   func(ctx context.Context) (io.ReadCloser, error)
	logf   func(format string, args ...any)
	retry  time.Duration
	opened int // times opened
}

func (r *reopener) run(ctx context.Context, out chan<- Batch) error {
	failing := false
	for ctx.Err() == nil {
		rc, err := r.open(ctx)
		if err != nil {
			if !failing {
				r.logf("%s: cannot open: %v; retrying every %v", r.name, err, r.retry)
				failing = true
			}
			select {
			case <-ctx.Done():
			case <-time.After(r.retry):
			}
			continue
		}
		failing = false
		r.opened++
		if r.opened > 1 {
			r.logf("%s: open again; reading goes on", r.name)
		}
		stop := make(chan struct{})
		var wg sync.WaitGroup
		wg.Add(1)
		go func() { // closing the port ends a blocked read when ctx ends
			defer wg.Done()
			select {
			case <-ctx.Done():
				rc.Close()
			case <-stop:
			}
		}()
		_, err = scan(ctx, rc, 0, r.opened > 1, out)
		close(stop)
		wg.Wait()
		rc.Close()
		if ctx.Err() != nil {
			return ctx.Err()
		}
		r.logf("%s: lost (%v); reopening", r.name, err)
	}
	return ctx.Err()
}

// Serial reads a serial port (a USB serial adapter, a board's CDC port, or
// a pseudo-terminal), reopening it when it disappears.
type Serial struct {
	Path string
	Baud int
	Logf func(format string, args ...any)
}

func (s *Serial) String() string { return "serial port " + s.Path }

// Live reports true.
func (s *Serial) Live() bool { return true }

// Run reads until ctx ends.
func (s *Serial) Run(ctx context.Context, out chan<- Batch) error {
	r := &reopener{name: s.String(), logf: s.Logf, retry: 500 * time.Millisecond,
		open: func(context.Context) (io.ReadCloser, error) {
			return serial.Open(s.Path, &serial.Mode{BaudRate: s.Baud, DataBits: 8, Parity: serial.NoParity, StopBits: serial.OneStopBit})
		}}
	return r.run(ctx, out)
}

// TCP connects to a device (or a serial-to-network bridge) that prints
// lines to whoever connects, reconnecting when the connection ends.
type TCP struct {
	Addr string
	Logf func(format string, args ...any)
}

func (t *TCP) String() string { return "tcp " + t.Addr }

// Live reports true.
func (t *TCP) Live() bool { return true }

// Run reads until ctx ends.
func (t *TCP) Run(ctx context.Context, out chan<- Batch) error {
	var d net.Dialer
	r := &reopener{name: t.String(), logf: t.Logf, retry: time.Second,
		open: func(ctx context.Context) (io.ReadCloser, error) {
			dctx, cancel := context.WithTimeout(ctx, 10*time.Second)
			defer cancel()
			return d.DialContext(dctx, "tcp", t.Addr)
		}}
	return r.run(ctx, out)
}

// Listen accepts connections from a device that connects to the relay
// and prints lines; a new connection replaces the current one (a device
// that reconnects after its old connection died unnoticed).
type Listen struct {
	Addr string
	Logf func(format string, args ...any)
	// Bound is called with the listening address once listening.
	Bound func(addr string)
}

func (l *Listen) String() string { return "listener " + l.Addr }

// Live reports true.
func (l *Listen) Live() bool { return true }

// Run accepts and reads until ctx ends.
func (l *Listen) Run(ctx context.Context, out chan<- Batch) error {
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", l.Addr)
	if err != nil {
		return fmt.Errorf("--listen: %w", err)
	}
	if l.Bound != nil {
		l.Bound(ln.Addr().String())
	}
	conns := make(chan net.Conn)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { // owns the listener
		defer wg.Done()
		for {
			c, err := ln.Accept()
			if err != nil {
				close(conns)
				return
			}
			select {
			case conns <- c:
			case <-ctx.Done():
				c.Close()
			}
		}
	}()
	defer wg.Wait()
	defer ln.Close()
	var cur net.Conn
	var readers sync.WaitGroup
	defer readers.Wait()
	n := 0
	for {
		select {
		case <-ctx.Done():
			if cur != nil {
				cur.Close()
			}
			return ctx.Err()
		case c, ok := <-conns:
			if !ok {
				return ctx.Err()
			}
			if cur != nil {
				l.Logf("%s: a new connection from %s replaces the one from %s", l, c.RemoteAddr(), cur.RemoteAddr())
				cur.Close()
			} else {
				l.Logf("%s: device connected from %s", l, c.RemoteAddr())
			}
			cur = c
			n++
			readers.Add(1)
			go func(c net.Conn, brk bool) {
				defer readers.Done()
				_, err := scan(ctx, c, 0, brk, out)
				c.Close()
				if ctx.Err() == nil && !errors.Is(err, net.ErrClosed) {
					l.Logf("%s: connection from %s ended (%v); waiting for the device", l, c.RemoteAddr(), err)
				}
			}(c, n > 1)
		}
	}
}

// EachLine calls fn with each line of r (without its line end), for a quick
// pass over a recording.
func EachLine(r io.Reader, fn func(line []byte)) error {
	br := bufio.NewReaderSize(r, 64<<10)
	for {
		b, err := br.ReadSlice('\n')
		if err == bufio.ErrBufferFull {
			for err == bufio.ErrBufferFull {
				_, err = br.ReadSlice('\n')
			}
			continue
		}
		if len(b) > 0 {
			fn(bytes.TrimRight(b, "\r\n"))
		}
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return err
		}
	}
}
