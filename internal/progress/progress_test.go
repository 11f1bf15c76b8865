package progress

import (
	"bytes"
	"os"
	"testing"
	"time"
)

// A line on a terminal: redrawn in place at most once per interval, ended
// once. The writer is a buffer standing in for the terminal (a real pty is
// not needed to check the bytes written).
func TestLineOnATerminal(t *testing.T) {
	var b bytes.Buffer
	clock := time.Unix(0, 0)
	l := &Line{w: &b, tty: true, every: time.Second, now: func() time.Time { return clock }}
	l.Draw("n=%d", 1)
	clock = clock.Add(300 * time.Millisecond)
	l.Draw("n=%d", 2) // too soon: skipped
	clock = clock.Add(time.Second)
	l.Draw("n=%d", 3)
	l.End("done %d", 3)
	if got, want := b.String(), "\r\x1b[Kn=1\r\x1b[Kn=3\r\x1b[Kdone 3\n"; got != want {
		t.Errorf("terminal output %q, want %q", got, want)
	}
	b.Reset()
	l = &Line{w: &b, tty: true, now: time.Now}
	l.End("")
	l.Draw("a")
	l.Draw("b")
	l.End("")
	if got, want := b.String(), "\r\x1b[Ka\r\x1b[Kb\n"; got != want {
		t.Errorf("unthrottled output %q, want %q", got, want)
	}
}

// Elsewhere only the milestone lines are written.
func TestLineElsewhere(t *testing.T) {
	var b bytes.Buffer
	l := New(&b, 0)
	if l.Terminal() {
		t.Fatal("a buffer taken for a terminal")
	}
	l.Draw("x")
	l.Println("half: %d%%", 50)
	l.End("done")
	if got, want := b.String(), "half: 50%\n"; got != want {
		t.Errorf("output %q, want %q", got, want)
	}
	f, err := os.CreateTemp(t.TempDir(), "log")
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if New(f, 0).Terminal() {
		t.Error("a regular file taken for a terminal")
	}
}
