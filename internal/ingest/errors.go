package ingest

import (
	"errors"
	"fmt"
)

// Errors the pipeline returns. The pipeline knows no transport: the gateway
// maps these to the gRPC status a device or an operator reads (its
// connect.go and fleet.go), with the message given here.

// Kind says what went wrong, as the caller should understand it.
type Kind int

const (
	// Invalid: the request or the device broke a rule (a field out of its
	// bounds, no valid introduction).
	Invalid Kind = iota + 1
	// NotFound: the device is not known to this gateway.
	NotFound
	// Precondition: the request cannot apply in the present state (the
	// device belongs to another gateway, has no alarm profile, or a profile
	// does not fit its open episodes).
	Precondition
	// TimedOut: the device did not do its part in time.
	TimedOut
	// Unavailable: try again later (the store failed a write, an older
	// stream did not end).
	Unavailable
	// StoreFull: the store has no room; back off.
	StoreFull
	// Internal: a fault of the gateway's own (a recovered panic).
	Internal
)

// Error is an error of one Kind with the message the caller is told.
type Error struct {
	Kind Kind
	Msg  string
}

func (e *Error) Error() string { return e.Msg }

func errorf(k Kind, format string, args ...any) *Error {
	return &Error{Kind: k, Msg: fmt.Sprintf(format, args...)}
}

// Causes with which a stream is ended from outside its handler. HandleStream
// returns the cause beside the handler's own error.
var (
	// ErrReplaced: a newer stream of the same device took over.
	ErrReplaced = errors.New("replaced by a newer stream of the same device")
	// ErrSendStalled: the device did not take an answer for
	// Config.SendStall (the message names the default).
	ErrSendStalled = fmt.Errorf("the device did not read its answers for %v", DefaultSendStall)
)

// errNoIntroduction cancels a stream that sent no valid introduction in
// time; the handler then returns an *Error of Kind TimedOut.
var errNoIntroduction = errors.New("no introduction")

// StoreFault is the cause of a stream ended because a batch with its
// device's data failed to commit; Resume is the device's durable position,
// from which it resends.
type StoreFault struct {
	Err    error
	Resume uint64
}

func (e *StoreFault) Error() string { return "store write failed: " + e.Err.Error() }
func (e *StoreFault) Unwrap() error { return e.Err }
