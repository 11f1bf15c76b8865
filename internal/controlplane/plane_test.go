package controlplane

import (
	"context"
	"errors"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/etcdtest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// recorder is an Applier that keeps what it was given.
type recorder struct {
	mu       sync.Mutex
	got      map[string]store.Token
	from     map[string]string
	profiles []Profile
	cals     []store.Calibration
	assigns  []Assignment
	labels   []Labels
}

func (r *recorder) ApplyCalibration(c store.Calibration, from string) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.cals = append(r.cals, c)
	return nil
}

func (r *recorder) ApplyLabels(l Labels, from string) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.labels = append(r.labels, l)
	return nil
}

func (r *recorder) ApplyAssignment(a Assignment, from string) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.assigns = append(r.assigns, a)
	return nil
}

func (r *recorder) ApplyToken(t store.Token, from string) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.got[t.Hash], r.from[t.Hash] = t, from
	return nil
}

func (r *recorder) ApplyProfile(pr Profile, from string) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.profiles = append(r.profiles, pr)
	return nil
}

func (r *recorder) get(hash string) (store.Token, string, bool) {
	r.mu.Lock()
	defer r.mu.Unlock()
	t, ok := r.got[hash]
	return t, r.from[hash], ok
}

func newPlane(t *testing.T, s *etcdtest.Server, self string) (*Plane, *recorder) {
	t.Helper()
	p, err := New(Config{Client: s.Client(t), Prefix: "/t/", Self: self})
	if err != nil {
		t.Fatal(err)
	}
	r := &recorder{got: map[string]store.Token{}, from: map[string]string{}}
	if err := p.Start(context.Background(), r); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(p.Close)
	return p, r
}

// A credential published by one gateway reaches another within 2 s, with
// the publishing gateway named; a gateway started later gets it from the
// snapshot; with etcd stopped, Status says so and a publish is refused with
// ErrUnreachable; with etcd back, publishing works again.
func TestPublishApplyAndOutage(t *testing.T) {
	s := etcdtest.Start(t)
	a, _ := newPlane(t, s, "a:1")
	_, rb := newPlane(t, s, "b:1")
	tok := store.Token{Hash: "h1", ID: "id1", Kind: "operator", Subject: "ops", Role: "admin", CreatedMS: 1}
	start := time.Now()
	if err := a.PublishToken(context.Background(), tok); err != nil {
		t.Fatal(err)
	}
	for {
		if got, from, ok := rb.get("h1"); ok {
			if got != tok || from != "a:1" {
				t.Fatalf("b applied %+v from %q, want %+v from a:1", got, from, tok)
			}
			break
		}
		if time.Since(start) > 2*time.Second {
			t.Fatal("b did not apply a's credential within 2 s")
		}
		time.Sleep(5 * time.Millisecond)
	}
	if err := a.PublishProfile(context.Background(), Profile{YAML: []byte("name: x"), Actor: "operator:ops", Reason: "r"}); err != nil {
		t.Fatal(err)
	}
	for start := time.Now(); ; time.Sleep(5 * time.Millisecond) {
		rb.mu.Lock()
		n := len(rb.profiles)
		rb.mu.Unlock()
		if n == 1 {
			break
		}
		if time.Since(start) > 2*time.Second {
			t.Fatal("b did not apply a's default profile within 2 s")
		}
	}
	_, rc := newPlane(t, s, "c:1")
	if _, _, ok := rc.get("h1"); !ok {
		t.Fatal("a gateway started later did not get the credential from the snapshot")
	}

	s.Stop()
	deadline := time.Now().Add(10 * time.Second)
	for {
		if up, detail := a.Status(); !up {
			if detail == "" {
				t.Fatal("down without a reason")
			}
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("Status still up 10 s after etcd stopped")
		}
		time.Sleep(100 * time.Millisecond)
	}
	if err := a.PublishToken(context.Background(), store.Token{Hash: "h2"}); !errors.Is(err, ErrUnreachable) {
		t.Fatalf("publish while etcd is down: %v, want ErrUnreachable", err)
	}
	s.Start()
	deadline = time.Now().Add(15 * time.Second)
	for {
		if up, _ := a.Status(); up {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("Status not up 15 s after etcd is back")
		}
		time.Sleep(100 * time.Millisecond)
	}
	tok2 := store.Token{Hash: "h3", ID: "id3", RevokedMS: 5}
	if err := a.PublishToken(context.Background(), tok2); err != nil {
		t.Fatal(err)
	}
	start = time.Now()
	for {
		if _, _, ok := rb.get("h3"); ok {
			break
		}
		if time.Since(start) > 2*time.Second {
			t.Fatal("after etcd came back, b did not apply a's change within 2 s (watch not resumed)")
		}
		time.Sleep(5 * time.Millisecond)
	}
}
