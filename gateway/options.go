package gateway

import (
	"fmt"
	"google.golang.org/grpc"
	"log/slog"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/estimator"
	"github.com/pulsefleet/pulsefleet/store"
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

	// BatchDelay is the longest a record waits before its batch commits; 0 means 10 ms.
	BatchDelay time.Duration
	// BatchRecords commits early when this many data messages wait; 0 means 4096.
	BatchRecords int
	// MaxMessageBytes bounds one message from a device; 0 means 64 KiB. Larger
	// messages up to the transport limit (8 MiB) are rejected with a reason and
	// the stream goes on; beyond it the transport ends the stream.
	MaxMessageBytes int
	// MaxChunkSamples bounds samples per raw chunk; 0 means 1000.
	MaxChunkSamples int
	// LateAfter: a message whose device time is this far behind the gateway
	// clock (after drift correction) counts as late; 0 means 10 s.
	LateAfter time.Duration
	// OfflineAfter: a device without a stream is fed to its alarm engine as
	// offline at once; the device_offline condition's delay applies. The
	// watchdog evaluates offline devices every WatchdogEvery; 0 means 1 s.
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
	// MaxPause bounds PauseAlarms; 0 means the profile's pause_max.
	GracefulTimeout time.Duration // 0 means 10 s
	// Peers is the gRPC address of every gateway sharing the fleet (the same
	// list on each); empty means this gateway serves every device. Self is
	// this gateway's entry in Peers. A device whose rendezvous owner
	// (package shard) is another peer is redirected there.
	Peers []string
	Self  string
	// GRPCServerOptions are added to the gRPC server's (TLS credentials, interceptors).
	GRPCServerOptions []grpc.ServerOption

	sendStall time.Duration // tests shorten it; 0 means sendStall (ingest.go)
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
	if o.MaxMessageBytes == 0 {
		o.MaxMessageBytes = 64 << 10
	}
	if o.MaxChunkSamples == 0 {
		o.MaxChunkSamples = 1000
	}
	if o.LateAfter == 0 {
		o.LateAfter = 10 * time.Second
	}
	if o.WatchdogEvery == 0 {
		o.WatchdogEvery = time.Second
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
		o.sendStall = sendStall
	}
	if o.GracefulTimeout == 0 {
		o.GracefulTimeout = 10 * time.Second
	}
	return nil
}

// transportMaxBytes is the gRPC receive limit: above it the transport ends the stream.
const transportMaxBytes = 8 << 20
