package gateway

import (
	"errors"
	"io"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/ingest"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Connect implements IngestService: the pipeline serves the stream
// (internal/ingest); the gateway tells the device how it ended.
func (g *Gateway) Connect(gs pb.IngestService_ConnectServer) error {
	remote := ""
	if p, ok := peer.FromContext(gs.Context()); ok {
		remote = p.Addr.String()
	}
	err, cause := g.ingest.HandleStream(gs.Context(), gs, remote)
	return g.endStatus(err, cause)
}

// endStatus turns the reason a stream ended into the status the device
// reads: nil for its own end, RESOURCE_EXHAUSTED or UNAVAILABLE when the
// store failed (back off, resend from the next welcome's resume point),
// ABORTED when a newer stream replaced it, UNAUTHENTICATED when its
// credential was revoked, DEADLINE_EXCEEDED when it did not read its
// answers, UNAVAILABLE at shutdown; else what the pipeline's error says
// (ingestStatus).
func (g *Gateway) endStatus(err, cause error) error {
	var ie *ingest.Error
	if errors.As(err, &ie) && ie.Kind == ingest.Internal {
		return ingestStatus(err) // a recovered panic, whatever else happened
	}
	if err == nil || errors.Is(err, io.EOF) {
		return nil
	}
	if cause == nil {
		cause = err
	}
	var sf *ingest.StoreFault
	switch {
	case errors.As(cause, &sf):
		if store.IsFull(sf.Err) {
			return status.Errorf(codes.ResourceExhausted, "store full: %v; back off and resend everything after sequence %d", sf.Err, sf.Resume)
		}
		return status.Errorf(codes.Unavailable, "store write failed: %v; back off and resend everything after sequence %d", sf.Err, sf.Resume)
	case errors.Is(cause, ingest.ErrReplaced):
		return status.Error(codes.Aborted, ingest.ErrReplaced.Error())
	case errors.Is(cause, auth.ErrRevoked):
		return status.Error(codes.Unauthenticated, "the stream's credential was revoked")
	case errors.Is(cause, ingest.ErrSendStalled):
		return status.Error(codes.DeadlineExceeded, ingest.ErrSendStalled.Error())
	case g.stopping.Load():
		return status.Error(codes.Unavailable, "gateway shutting down; reconnect")
	}
	return ingestStatus(err)
}

// ingestStatus maps an error of the pipeline to a gRPC status with the
// pipeline's message; a status error (from internal/auth) passes as it is;
// anything else is UNAVAILABLE.
func ingestStatus(err error) error {
	if err == nil {
		return nil
	}
	var ie *ingest.Error
	if errors.As(err, &ie) {
		return status.Error(kindCodes[ie.Kind], ie.Msg)
	}
	if _, ok := status.FromError(err); ok {
		return err
	}
	return status.Error(codes.Unavailable, err.Error())
}

var kindCodes = map[ingest.Kind]codes.Code{
	ingest.Invalid:      codes.InvalidArgument,
	ingest.NotFound:     codes.NotFound,
	ingest.Precondition: codes.FailedPrecondition,
	ingest.TimedOut:     codes.DeadlineExceeded,
	ingest.Unavailable:  codes.Unavailable,
	ingest.StoreFull:    codes.ResourceExhausted,
	ingest.Internal:     codes.Internal,
}
