package gateway

import (
	"fmt"
	"log/slog"
	"strings"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/protobuf/proto"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/internal/ids"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Options configure a Gateway. Zero values take the defaults named below.
type Options struct {
	// Store is the open history store; required. The caller closes it after Serve returns.
	Store *store.DB
	// Registerer receives the gateway's metrics; nil means a private registry.
	// Gatherer serves /metrics; nil means the Registerer when it is a *prometheus.Registry.
	Registerer prometheus.Registerer
	Gatherer   prometheus.Gatherer
	// Logger; nil discards.
	Logger *slog.Logger
	// Now is the gateway clock; nil means time.Now. Tests inject their own.
	Now func() time.Time

	// BatchDelay is how long a batch collects after its first record (under
	// load the writer also paces commits, internal/ingest/writer.go); 0 means 10 ms.
	BatchDelay time.Duration
	// BatchRecords commits early when this many data messages wait; 0 means 4096.
	BatchRecords int
	// MaxMessageBytes bounds one message from a device: a larger one (up to
	// the transport limit, transportMaxBytes) is rejected with
	// REJECT_REASON_TOO_LARGE and the stream goes on. 0 means the largest
	// valid device message for MaxChunkSamples (ingest.LargestValidMessage: a raw
	// chunk of that many 24-bit samples on three channels, 12,060 bytes at
	// 1,000) plus a quarter for fields a newer device may add, rounded up to
	// 4 KiB: 16 KiB by default.
	MaxMessageBytes int
	// MaxChunkSamples bounds samples per raw chunk; 0 means 1000.
	MaxChunkSamples int
	// LateAfter: a message whose device time is this far behind the gateway
	// clock (after drift correction) counts as late; 0 means 10 s.
	LateAfter time.Duration
	// WatchdogEvery is how often the watchdog evaluates devices without a
	// stream (ingest.Pipeline.Tick); 0 means 1 s. Such a device is fed to
	// its alarm engine as offline at once; the device_offline condition's
	// delay applies.
	WatchdogEvery time.Duration
	// DefaultProfile is the alarm profile for devices without their own; nil
	// means the built-in adult-ward-pilot (set by the caller) or none.
	DefaultProfile *alarms.Profile
	// ResolveCalibration resolves a calibration reference for raw streams;
	// nil means the gateway's own: "empirical", "beer-lambert", or a curve
	// stored with AdminService.PutCalibration ("name" or "name@vN").
	ResolveCalibration func(name string, redNM, irNM float64) (estimator.Calibration, string, error)
	// CaptureRaw keeps raw samples of every raw stream (bounded by retention).
	CaptureRaw bool
	// Retention of history; zero fields keep forever.
	Retention store.Retention
	// Backups takes scheduled snapshots of the store (backup_schedule.go);
	// the zero value takes none.
	Backups BackupSchedule
	// ExportRate bounds the history points per second that
	// FleetService.ExportTrend reads, shared by every export running at
	// once, so reading history does not take the cores live ingest needs;
	// 0 means defaultExportRate (100,000: an hour of 1,000 devices' 1 Hz
	// trend in 36 s), negative means no bound.
	ExportRate int
	// GracefulTimeout bounds each stage of a shutdown (flushing the store,
	// waiting for streams to end) before the gateway stops harder; 0 means
	// 10 s.
	GracefulTimeout time.Duration
	// Peers is the gRPC address of every gateway sharing the fleet (the same
	// list on each); empty means this gateway serves every device. Self is
	// this gateway's entry in Peers. A device whose rendezvous owner
	// (package shard) is another peer is redirected there.
	Peers []string
	Self  string
	// Cluster, when set, replaces Peers: owners come from the live member
	// list (package cluster over etcd) and each stream holds its device's
	// fence (cluster.go).
	Cluster Cluster
	// ControlPlane, when set, shares credentials with the fleet's other
	// gateways (controlplane.go); nil keeps them in this store only.
	ControlPlane ControlPlane
	// GRPCServerOptions are added to the gRPC server's (TLS credentials, interceptors).
	GRPCServerOptions []grpc.ServerOption
	// Security configures credential enforcement, web sessions and the
	// per-stream message rate.
	Security SecurityOptions

	sendStall time.Duration // tests shorten it; 0 means ingest.DefaultSendStall
}

func (o *Options) setDefaults() error {
	if o.Store == nil {
		return fmt.Errorf("gateway: Options.Store is required")
	}
	if o.Registerer == nil {
		r := prometheus.NewRegistry()
		o.Registerer = r
		if o.Gatherer == nil {
			o.Gatherer = r
		}
	}
	if o.Gatherer == nil {
		if g, ok := o.Registerer.(prometheus.Gatherer); ok {
			o.Gatherer = g
		} else {
			return fmt.Errorf("gateway: Options.Gatherer is required with a Registerer that cannot gather")
		}
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.BatchDelay == 0 {
		o.BatchDelay = 10 * time.Millisecond
	}
	if o.BatchRecords == 0 {
		o.BatchRecords = 4096
	}
	if o.MaxChunkSamples == 0 {
		o.MaxChunkSamples = 1000
	}
	if o.MaxMessageBytes == 0 {
		o.MaxMessageBytes = ingest.DefaultMaxMessageBytes(o.MaxChunkSamples)
	}
	if n := ingest.LargestValidMessage(o.MaxChunkSamples); o.MaxMessageBytes < n || o.MaxMessageBytes > transportMaxBytes {
		return fmt.Errorf("gateway: Options.MaxMessageBytes %d, want %d (the largest valid message: a raw chunk of %d samples) .. %d (the transport limit)",
			o.MaxMessageBytes, n, o.MaxChunkSamples, transportMaxBytes)
	}
	if o.LateAfter == 0 {
		o.LateAfter = 10 * time.Second
	}
	if o.WatchdogEvery == 0 {
		o.WatchdogEvery = time.Second
	}
	if len(o.Peers) > 0 && o.Cluster != nil {
		return fmt.Errorf("gateway: Options.Peers and Options.Cluster are exclusive")
	}
	if len(o.Peers) > 0 {
		found := false
		for _, p := range o.Peers {
			found = found || p == o.Self
		}
		if !found {
			return fmt.Errorf("gateway: Options.Self %q is not one of Options.Peers %v", o.Self, o.Peers)
		}
	}
	if o.sendStall == 0 {
		o.sendStall = ingest.DefaultSendStall
	}
	if o.ExportRate == 0 {
		o.ExportRate = defaultExportRate
	}
	if o.GracefulTimeout == 0 {
		o.GracefulTimeout = 10 * time.Second
	}
	if err := o.Security.validate(); err != nil {
		return err
	}
	o.Security.setDefaults()
	return nil
}

// Transport bounds on what one stream can make the gateway hold. The gRPC
// receive limit (transportMaxBytes) is the largest valid request of any
// service, plus room for fields a newer client may add: a message above it
// ends its stream with RESOURCE_EXHAUSTED before it is read (gRPC reads the
// length first), so no stream makes the gateway buffer more for one
// message. Each stream holds at most one message being received plus what
// its flow-control window lets a client send ahead of the gateway reading
// (streamWindow); a connection's streams together at most connWindow
// ahead, and a connection carries at most maxStreamsPerConn streams. So N
// hostile streams on their own connections hold at most N x (80 + 64) KiB
// = N x 144 KiB of received bytes, 20 of them under 3 MiB.
const (
	transportMaxBytes = 80 << 10
	streamWindow      = 64 << 10
	connWindow        = 1 << 20
	maxStreamsPerConn = 1024
)

// largestValidRequest is the encoded size of the largest request an
// operator can send that passes validation: SetAlarmProfile with a 64 KiB
// profile, a 64-character device id and a 500-character reason (66,109
// bytes; PutCalibration's 64 KiB curve is a little smaller).
func largestValidRequest() int {
	return proto.Size(&pb.SetAlarmProfileRequest{DeviceId: strings.Repeat("x", ids.MaxLen),
		ProfileYaml: strings.Repeat("y", 64<<10), Reason: strings.Repeat("r", 500)})
}
