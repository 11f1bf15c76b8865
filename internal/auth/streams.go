package auth

import (
	"context"
	"errors"
)

// MaxDeviceStreams bounds the concurrent streams of one device credential.
const MaxDeviceStreams = 4

// ErrRevoked is the cause of the cancelled context of a stream whose
// credential was revoked.
var ErrRevoked = errors.New("credential revoked")

// streamHandle is one open stream made with a credential.
type streamHandle struct{ cancel context.CancelCauseFunc }

// OpenStream registers a long call (a gRPC stream, the web page's event
// stream) made with p's credential: the returned context is cancelled with
// cause ErrRevoked when the credential is revoked. release must be called
// when the call ends. ok is false (and nothing is registered) when a device
// credential already holds MaxDeviceStreams; web calls that must not be
// refused may ignore ok only when p is an operator's.
func (a *Authenticator) OpenStream(parent context.Context, p Principal) (_ context.Context, release func(), ok bool) {
	ctx, cancel := context.WithCancelCause(parent)
	h := &streamHandle{cancel: cancel}
	a.mu.Lock()
	defer a.mu.Unlock()
	if a.streams == nil {
		a.streams = map[string]map[*streamHandle]struct{}{}
	}
	set := a.streams[p.TokenID]
	if p.Kind == "device" && len(set) >= MaxDeviceStreams {
		cancel(nil)
		return parent, func() {}, false
	}
	if set == nil {
		set = map[*streamHandle]struct{}{}
		a.streams[p.TokenID] = set
	}
	set[h] = struct{}{}
	return ctx, func() { a.closeStream(p.TokenID, h); cancel(nil) }, true
}

func (a *Authenticator) closeStream(tokenID string, h *streamHandle) {
	a.mu.Lock()
	defer a.mu.Unlock()
	delete(a.streams[tokenID], h)
	if len(a.streams[tokenID]) == 0 {
		delete(a.streams, tokenID)
	}
}

// endStreams ends every open stream made with credential tokenID.
func (a *Authenticator) endStreams(tokenID string) {
	a.mu.Lock()
	defer a.mu.Unlock()
	for h := range a.streams[tokenID] {
		h.cancel(ErrRevoked)
	}
}

// OpenStreams counts the open streams made with credential tokenID.
func (a *Authenticator) OpenStreams(tokenID string) int {
	a.mu.RLock()
	defer a.mu.RUnlock()
	return len(a.streams[tokenID])
}
