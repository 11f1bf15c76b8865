package progress

import (
	"fmt"
	"io"
	"os"
	"time"

	"golang.org/x/term"
)

// Line is one status line on w. It is not safe for concurrent use: one
// goroutine (the command's) reports through it.
type Line struct {
	w     io.Writer
	tty   bool
	every time.Duration
	last  time.Time
	drawn bool
	now   func() time.Time
}

// New reports on w, redrawing at most once per every (0: at every call).
// The line is drawn only when w is a terminal.
func New(w io.Writer, every time.Duration) *Line {
	l := &Line{w: w, every: every, now: time.Now}
	if f, ok := w.(*os.File); ok && term.IsTerminal(int(f.Fd())) {
		l.tty = true
	}
	return l
}

// Terminal reports whether the line is drawn (w is a terminal).
func (l *Line) Terminal() bool { return l.tty }

// Draw replaces the status line with the formatted text, unless the last
// drawing was less than every ago or w is not a terminal.
func (l *Line) Draw(format string, args ...any) {
	if !l.tty {
		return
	}
	now := l.now()
	if l.drawn && l.every > 0 && now.Sub(l.last) < l.every {
		return
	}
	l.last, l.drawn = now, true
	fmt.Fprintf(l.w, "\r\x1b[K"+format, args...)
}

// Println writes a whole line whatever w is: a milestone for logs.
func (l *Line) Println(format string, args ...any) {
	fmt.Fprintf(l.w, format+"\n", args...)
}

// End finishes the status line on a terminal: with a format, the line is
// replaced by that final text; without one, the drawn line is kept and
// ended. Nothing is written when w is not a terminal.
func (l *Line) End(format string, args ...any) {
	if !l.tty {
		return
	}
	switch {
	case format != "":
		fmt.Fprintf(l.w, "\r\x1b[K"+format+"\n", args...)
	case l.drawn:
		fmt.Fprintln(l.w)
	}
	l.drawn = false
}
