package gateway

import (
	"context"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// ListLedgerCoverage answers what the ledger holds: a device that arrived
// with message 6 (its 1..5 are on another gateway) has one span 6..8 with
// its device times; bad requests name the field and the bound.
func TestListLedgerCoverage(t *testing.T) {
	h := newHarness(t, nil)
	d, _ := h.connect(t, &pb.Introduction{DeviceId: "cov-1", Mode: pb.Mode_MODE_SUMMARY})
	base := time.Now().Add(-time.Minute).Truncate(time.Second).UnixMilli()
	for s := uint64(6); s <= 8; s++ {
		v := 97.0
		d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Summary{Summary: &pb.Summary{Sequence: s, DeviceTimeUnixMs: base + int64(s)*1000, Spo2Pct: &v}}})
	}
	d.waitAck(8)
	resp, err := h.fleet().ListLedgerCoverage(context.Background(), &pb.ListLedgerCoverageRequest{DeviceIds: []string{"cov-1"}})
	if err != nil {
		t.Fatal(err)
	}
	want := &pb.SequenceSpan{FirstSequence: 6, LastSequence: 8, FirstDeviceTimeUnixMs: base + 6000, LastDeviceTimeUnixMs: base + 8000}
	if len(resp.GetDevices()) != 1 || resp.GetDevices()[0].GetDeviceId() != "cov-1" || len(resp.GetDevices()[0].GetSpans()) != 1 ||
		resp.GetDevices()[0].GetSpans()[0].String() != want.String() {
		t.Errorf("coverage %v, want cov-1 with %v", resp, want)
	}
	for _, tc := range []struct {
		ids  []string
		want string
	}{
		{[]string{"bad id"}, "device_ids"},
		{make([]string, maxCoverageDevices+1), "device_ids: 10001, want at most 10000"},
	} {
		_, err := h.fleet().ListLedgerCoverage(context.Background(), &pb.ListLedgerCoverageRequest{DeviceIds: tc.ids})
		if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%d ids: %v, want InvalidArgument naming %q", len(tc.ids), err, tc.want)
		}
	}
}
