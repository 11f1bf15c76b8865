package gateway

import (
	"net/http"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/alarms"
	"github.com/pulsefleet/pulsefleet/internal/store"
	"github.com/pulsefleet/pulsefleet/internal/web"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
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

// AlarmProfile returns the profile in force for a device (the same as
// GetAlarmProfile, without the YAML round trip: the overview asks for
// thousands of devices at once).
func (f fleetForWeb) AlarmProfile(deviceID string) (*alarms.Profile, string, error) {
	if err := checkID(deviceID); err != nil {
		return nil, "", err
	}
	p, origin, err := f.ingest.Profile(deviceID)
	if err != nil {
		return nil, "", ingestStatus(err)
	}
	if p == nil {
		return nil, "", status.Errorf(codes.NotFound, "no alarm profile is configured")
	}
	return p, origin, nil
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
		Audit:      g.audit,
		HTTPError:  httpStatusOf,
		Enrolments: &participantService{g: g},
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
