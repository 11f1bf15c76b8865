package gateway

import (
	"context"
	"maps"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Operator labels set before a device's first connection are on its
// description from that connection, beside and over the introduction's;
// a change applies at once to a known device, removing them leaves the
// introduction's, and every change is audited. Bad labels are refused
// naming the field and the bound.
func TestDeviceLabels(t *testing.T) {
	h := newHarness(t, nil)
	ctx := auth.WithActor(context.Background(), "nurse-ada")
	labels := func() map[string]string {
		t.Helper()
		r, err := h.g.GetDevice(ctx, &pb.GetDeviceRequest{DeviceId: "lab-01"})
		if err != nil {
			t.Fatal(err)
		}
		return r.GetDevice().GetLabels()
	}
	if _, err := h.g.SetDeviceLabels(ctx, &pb.SetDeviceLabelsRequest{DeviceId: "lab-01", Labels: map[string]string{"bed": "12", "ward": "east"}, Reason: "admitted"}); err != nil {
		t.Fatal(err)
	}
	in := summaryIntro("lab-01")
	in.Labels = map[string]string{"bed": "from-device", "home": "no"}
	h.connect(t, in)
	if got, want := labels(), map[string]string{"bed": "12", "ward": "east", "home": "no"}; !maps.Equal(got, want) {
		t.Fatalf("labels at the first connection: %v, want %v", got, want)
	}
	if _, err := h.g.SetDeviceLabels(ctx, &pb.SetDeviceLabelsRequest{DeviceId: "lab-01", Labels: map[string]string{"bed": "14"}}); err != nil {
		t.Fatal(err)
	}
	if got, want := labels(), map[string]string{"bed": "14", "home": "no"}; !maps.Equal(got, want) {
		t.Fatalf("labels after a change: %v, want %v", got, want)
	}
	if _, err := h.g.SetDeviceLabels(ctx, &pb.SetDeviceLabelsRequest{DeviceId: "lab-01"}); err != nil {
		t.Fatal(err)
	}
	if got, want := labels(), map[string]string{"bed": "from-device", "home": "no"}; !maps.Equal(got, want) {
		t.Fatalf("labels after removing the operator's: %v, want %v", got, want)
	}
	big := map[string]string{}
	for _, k := range []string{"a", "b", "c", "d", "e", "f", "g", "h", "i"} {
		big[k] = "x"
	}
	for _, bad := range []*pb.SetDeviceLabelsRequest{
		{DeviceId: "lab-01", Labels: big},
		{DeviceId: "lab-01", Labels: map[string]string{"": "x"}},
		{DeviceId: "", Labels: map[string]string{"bed": "1"}},
	} {
		if _, err := h.g.SetDeviceLabels(ctx, bad); err == nil {
			t.Errorf("labels %v for %q accepted", bad.GetLabels(), bad.GetDeviceId())
		}
	}
	au, err := h.db.Audit(0, "device.labels", 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(au) != 3 || au[2].Actor != "nurse-ada" || au[2].Device != "lab-01" || au[2].Detail != `labels bed="12" ward="east"; reason: admitted` {
		t.Errorf("audit: %+v", au)
	}
}
