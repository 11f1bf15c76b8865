package main

import (
	"bytes"
	"context"
	"github.com/pulsefleet/pulsefleet/internal/caution"
	"strings"
	"sync"
	"testing"
	"time"
)

// watchWriter collects output and closes found once it contains want.
type watchWriter struct {
	mu    sync.Mutex
	buf   bytes.Buffer
	want  string
	found chan struct{}
	once  sync.Once
}

func (w *watchWriter) Write(p []byte) (int, error) {
	w.mu.Lock()
	defer w.mu.Unlock()
	n, err := w.buf.Write(p)
	if strings.Contains(w.buf.String(), w.want) {
		w.once.Do(func() { close(w.found) })
	}
	return n, err
}

func (w *watchWriter) String() string {
	w.mu.Lock()
	defer w.mu.Unlock()
	return w.buf.String()
}

// The demo starts with no setup, says it is not certified, prints where it
// is, shows its devices live and announces the scripted desaturation of bed
// 3 as a spo2_low alarm; stopping it (Ctrl-C) is clean. The scenario runs 4x
// faster than wall time here so the alarm (about 45 s of scenario time:
// ramp below 90 % by ~29 s plus the profile's 15 s delay) comes sooner; the
// bound below is generous and only guards against a hang.
func TestDemoShowsDevicesAndAnAlarm(t *testing.T) {
	out := &watchWriter{want: "alarm announced: larkspur-bed-03 spo2_low", found: make(chan struct{})}
	var errb bytes.Buffer
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan int, 1)
	go func() {
		done <- run(ctx, []string{"demo", "--speed", "4"}, stdio{in: strings.NewReader(""), out: out, err: &errb})
	}()
	select {
	case <-out.found:
	case code := <-done:
		t.Fatalf("demo ended early with %d: %s\n%s", code, out.String(), errb.String())
	case <-time.After(3 * time.Minute):
		cancel()
		<-done
		t.Fatalf("no spo2_low announcement from bed 3:\n%s\n%s", out.String(), errb.String())
	}
	cancel() // as Ctrl-C does
	if code := <-done; code != 0 {
		t.Fatalf("demo exit %d after stop: %s", code, errb.String())
	}
	got := out.String()
	for _, want := range []string{caution.Line, "web page: http://127.0.0.1:", "metrics:  http://127.0.0.1:",
		"gRPC:     127.0.0.1:", "live: ", "pulsefleet demo: stopped."} {
		if !strings.Contains(got, want) {
			t.Errorf("demo output lacks %q:\n%s", want, got)
		}
	}
}
