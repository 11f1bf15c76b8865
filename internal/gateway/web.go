package gateway

import (
	"net/http"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/web"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// fleetForWeb is the gateway as the web page sees it (web.Fleet): the
// FleetService methods it embeds, plus raw captures, live events and the
// clock.
type fleetForWeb struct{ *Gateway }

func (f fleetForWeb) RawCaptures(deviceID string, fromMS, toMS int64, fn func(store.RawCapture) bool) error {
	return f.db.RawCaptures(deviceID, fromMS, toMS, fn)
}

func (f fleetForWeb) Watch(devices []string, points bool, buffer int) (<-chan *pb.WatchEventsResponse, func()) {
	return f.ingest.Watch(devices, points, buffer)
}

func (f fleetForWeb) Stopping() bool { return f.stopping.Load() }

func (f fleetForWeb) NowMS() int64 { return f.nowMS() }

// Participants maps each device enrolled at atMS to its participant.
func (f fleetForWeb) Participants(atMS int64) (map[string]string, error) {
	es, err := f.db.Enrolments("", "")
	if err != nil {
		return nil, err
	}
	out := map[string]string{}
	for _, e := range es {
		if e.Interval().Contains(atMS) {
			out[e.Device] = e.Participant
		}
	}
	return out, nil
}

// newWeb builds the web page's server over g.
func (g *Gateway) newWeb() *web.Server {
	return web.New(web.Config{
		Fleet: fleetForWeb{g},
		Auth:  g.auth,
		Sessions: func() web.SessionOptions {
			sec := g.security()
			return web.SessionOptions{TTL: sec.SessionTTL, SecureCookies: sec.SecureCookies}
		},
		Audit:     g.audit,
		HTTPError: httpStatusOf,
	})
}

// httpStatusOf maps the gRPC status of a FleetService error to the HTTP
// status the page's JSON answers with, and the message it shows.
func httpStatusOf(err error) (int, string) {
	code := http.StatusInternalServerError
	st, _ := status.FromError(err)
	switch st.Code() {
	case codes.InvalidArgument, codes.OutOfRange:
		code = http.StatusBadRequest
	case codes.NotFound:
		code = http.StatusNotFound
	case codes.FailedPrecondition, codes.AlreadyExists, codes.Aborted:
		code = http.StatusConflict
	case codes.Unauthenticated:
		code = http.StatusUnauthorized
	case codes.PermissionDenied:
		code = http.StatusForbidden
	case codes.Unavailable, codes.ResourceExhausted:
		code = http.StatusServiceUnavailable
	}
	return code, st.Message()
}
