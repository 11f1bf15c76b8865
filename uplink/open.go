package uplink

import (
	"context"
	"errors"
	"fmt"
	"io"

	"google.golang.org/grpc"
	"google.golang.org/grpc/metadata"

	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// RedirectError is the gateway's answer that the device belongs to another
// gateway.
type RedirectError struct {
	Address string // host:port of the owner; may be empty
	Detail  string
}

func (e *RedirectError) Error() string {
	return fmt.Sprintf("redirected to %q: %s", e.Address, e.Detail)
}

// RejectedError is a refused introduction.
type RejectedError struct{ Rejection *pb.Rejection }

func (e *RejectedError) Error() string {
	return fmt.Sprintf("introduction rejected: %s: %s", e.Rejection.GetField(), e.Rejection.GetDetail())
}

// Open opens the Connect stream on conn with ctx (cancel ctx to end the
// stream), sends intro with the bearer token (if any) and waits for the
// gateway's first answer. It returns the stream and the Welcome; a Redirect
// is a *RedirectError and a refused introduction a *RejectedError.
func Open(ctx context.Context, conn grpc.ClientConnInterface, token string, intro *pb.ConnectRequest) (pb.IngestService_ConnectClient, *pb.Welcome, error) {
	if token != "" {
		ctx = metadata.AppendToOutgoingContext(ctx, "authorization", "Bearer "+token)
	}
	st, err := pb.NewIngestServiceClient(conn).Connect(ctx)
	if err != nil {
		return nil, nil, fmt.Errorf("open stream: %w", err)
	}
	if err := st.Send(intro); err != nil {
		return nil, nil, fmt.Errorf("send introduction: %w", recvError(st, err))
	}
	m, err := st.Recv()
	if err != nil {
		return nil, nil, fmt.Errorf("await welcome: %w", err)
	}
	switch k := m.Kind.(type) {
	case *pb.ConnectResponse_Welcome:
		return st, k.Welcome, nil
	case *pb.ConnectResponse_Redirect:
		return nil, nil, &RedirectError{Address: k.Redirect.GetAddress(), Detail: k.Redirect.GetDetail()}
	case *pb.ConnectResponse_Rejection:
		return nil, nil, &RejectedError{Rejection: k.Rejection}
	default:
		return nil, nil, fmt.Errorf("first answer is %T, want a welcome", m.Kind)
	}
}

// recvError returns the stream's real error after Send reported io.EOF
// (gRPC then returns the status from Recv).
func recvError(st pb.IngestService_ConnectClient, err error) error {
	if errors.Is(err, io.EOF) {
		if _, rerr := st.Recv(); rerr != nil {
			return rerr
		}
	}
	return err
}
