package controlplane

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"sync"
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/etcdtest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Calibration versions are the fleet's: two gateways putting the same name
// at once get different versions, a version held only in one gateway's own
// store is skipped (atLeast), every gateway applies each version and then
// the assignment naming it (in that order, also from the snapshot of a
// gateway started later), and nothing is published while etcd is down.
func TestCalibrationVersionsAndAssignments(t *testing.T) {
	s := etcdtest.Start(t)
	a, _ := newPlane(t, s, "a:1")
	b, rb := newPlane(t, s, "b:1")
	var wg sync.WaitGroup
	got := make([]uint32, 6)
	errs := make([]error, 6)
	for i := range got {
		wg.Add(1)
		go func() {
			defer wg.Done()
			p := a
			if i%2 == 1 {
				p = b
			}
			c, err := p.PublishCalibration(context.Background(), store.Calibration{Name: "ward", CurveYAML: fmt.Sprintf("curve %d", i)}, 1)
			got[i], errs[i] = c.Version, err
		}()
	}
	wg.Wait()
	for _, err := range errs {
		if err != nil {
			t.Fatal(err)
		}
	}
	sorted := append([]uint32(nil), got...)
	sort.Slice(sorted, func(i, j int) bool { return sorted[i] < sorted[j] })
	for i, v := range sorted {
		if v != uint32(i+1) {
			t.Fatalf("versions given to 6 concurrent puts: %v, want 1..6 each once", got)
		}
	}
	c, err := a.PublishCalibration(context.Background(), store.Calibration{Name: "ward", CurveYAML: "local"}, 9)
	if err != nil || c.Version != 9 {
		t.Fatalf("put above a version held locally (9): version %d, %v", c.Version, err)
	}
	if err := a.PublishAssignment(context.Background(), Assignment{Target: "model:x", Ref: "ward@v9", Actor: "operator:ops"}); err != nil {
		t.Fatal(err)
	}
	if err := a.PublishLabels(context.Background(), Labels{Device: "d1", Labels: map[string]string{"bed": "4"}}); err != nil {
		t.Fatal(err)
	}
	for start := time.Now(); ; time.Sleep(5 * time.Millisecond) {
		rb.mu.Lock()
		n, m, l := len(rb.cals), len(rb.assigns), len(rb.labels)
		rb.mu.Unlock()
		if n == 7 && m == 1 && l == 1 {
			break
		}
		if time.Since(start) > 2*time.Second {
			t.Fatalf("b applied %d calibrations, %d assignments and %d labels within 2 s, want 7, 1 and 1", n, m, l)
		}
	}
	_, rc := newPlane(t, s, "c:1")
	rc.mu.Lock()
	defer rc.mu.Unlock()
	if len(rc.cals) != 7 || len(rc.assigns) != 1 || rc.assigns[0].Ref != "ward@v9" {
		t.Fatalf("late starter: %d calibrations, assignments %+v", len(rc.cals), rc.assigns)
	}
	s.Stop()
	for deadline := time.Now().Add(10 * time.Second); ; time.Sleep(100 * time.Millisecond) {
		if up, _ := a.Status(); !up {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("Status still up 10 s after etcd stopped")
		}
	}
	if _, err := a.PublishCalibration(context.Background(), store.Calibration{Name: "ward", CurveYAML: "x"}, 1); !errors.Is(err, ErrUnreachable) {
		t.Fatalf("put while etcd is down: %v, want ErrUnreachable", err)
	}
	if err := a.PublishAssignment(context.Background(), Assignment{Target: "model:x"}); !errors.Is(err, ErrUnreachable) {
		t.Fatalf("assign while etcd is down: %v, want ErrUnreachable", err)
	}
	if err := a.PublishLabels(context.Background(), Labels{Device: "d1"}); !errors.Is(err, ErrUnreachable) {
		t.Fatalf("labels while etcd is down: %v, want ErrUnreachable", err)
	}
}
