package notify

import (
	"net/url"
	"strconv"
	"strings"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/caution"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// Alert is one alert in the JSON that Alertmanager's API v2 accepts at
// POST /api/v2/alerts (an array of these): labels identify the alert,
// annotations describe it, startsAt/endsAt are RFC 3339 times, and an
// endsAt in the past resolves it. Without endsAt Alertmanager keeps a
// firing alert for its resolve_timeout (default 5 minutes), so active
// alerts are sent again well within it (Options.Resend).
type Alert struct {
	Labels       map[string]string `json:"labels"`
	Annotations  map[string]string `json:"annotations,omitempty"`
	StartsAt     string            `json:"startsAt,omitempty"`
	EndsAt       string            `json:"endsAt,omitempty"`
	GeneratorURL string            `json:"generatorURL,omitempty"`
}

// AlertName is the alertname label of every alert pulsefleet sends.
const AlertName = "PulsefleetAlarm"

// Labels the gateway sets; a device label of the same name is left out.
var ownLabels = map[string]bool{"alertname": true, "device": true, "condition": true, "priority": true,
	"model": true, "gateway": true, "episode": true}

// priorities in increasing order (the project's words).
var priorities = []string{"low", "medium", "high"}

// Build returns the alerts that state an episode as it is now: one alert,
// firing while the episode is active (announced and not ended, or latched
// and not yet acknowledged) and resolved once it ended; for an escalated
// episode also a resolved alert for each lower priority, so the alert sent
// before the escalation (priority is a label) does not stay firing.
// gateway names the sending gateway; pageBase is the web page's external
// URL ("" leaves the link out); now resolves an inactive episode without
// an end time.
func Build(e *store.Episode, dev *store.Device, gateway, pageBase string, now time.Time) []Alert {
	return build(e, dev, gateway, pageBase, now, false)
}

// BuildFleet is Build for a gateway of a fleet on etcd, where an episode
// goes on at another gateway when its device moves there (that gateway
// adopts the alarm state): the alert must be the same one whichever gateway
// sends it, so that the new gateway's resends keep it firing and its
// resolution resolves it. So the identifying labels hold nothing of one
// gateway: episode is the device's own episode number (the alarm engine's,
// which goes on across gateways), and the gateway and its stored episode id
// are annotations (gateway, episode_id).
func BuildFleet(e *store.Episode, dev *store.Device, gateway, pageBase string, now time.Time) []Alert {
	return build(e, dev, gateway, pageBase, now, true)
}

// DeviceEpisode is the device's own number of a stored episode (the low 32
// bits of its id; the high ones are the device's index in one gateway's
// store).
func DeviceEpisode(id uint64) uint64 { return id & 0xffffffff }

func build(e *store.Episode, dev *store.Device, gateway, pageBase string, now time.Time, fleet bool) []Alert {
	labels := map[string]string{}
	if dev != nil {
		for k, v := range dev.Labels {
			if n := LabelName(k); n != "" && !ownLabels[n] && v != "" {
				labels[n] = v
			}
		}
		if dev.Model != "" {
			labels["model"] = dev.Model
		}
	}
	labels["alertname"] = AlertName
	labels["device"] = e.Device
	labels["condition"] = e.Condition
	labels["priority"] = e.Priority
	an := annotations(e, pageBase)
	if fleet {
		labels["episode"] = strconv.FormatUint(DeviceEpisode(e.ID), 10)
		an["episode_id"] = strconv.FormatUint(e.ID, 10)
		if gateway != "" {
			an["gateway"] = gateway
		}
	} else {
		labels["episode"] = strconv.FormatUint(e.ID, 10)
		if gateway != "" {
			labels["gateway"] = gateway
		}
	}
	start := ms(e.AnnouncedMS)
	if e.AnnouncedMS <= 0 {
		start = ms(e.OnsetMS)
	}
	a := Alert{Labels: labels, Annotations: an, StartsAt: rfc(start)}
	if pageBase != "" {
		a.GeneratorURL = a.Annotations["device_page"]
	}
	if !e.Active {
		a.EndsAt = rfc(endOf(e, start, now))
	}
	out := []Alert{a}
	if e.EscalatedMS > 0 {
		end := ms(e.EscalatedMS)
		if end.Before(start) {
			end = start
		}
		for _, p := range priorities {
			if p == e.Priority {
				break
			}
			l := make(map[string]string, len(labels))
			for k, v := range labels {
				l[k] = v
			}
			l["priority"] = p
			out = append(out, Alert{Labels: l, Annotations: a.Annotations, StartsAt: a.StartsAt, EndsAt: rfc(end), GeneratorURL: a.GeneratorURL})
		}
	}
	return out
}

// endOf is when an inactive episode's alarm stopped: its end, or the
// acknowledgement that stopped a latched signal, whichever is later; never
// before start.
func endOf(e *store.Episode, start, now time.Time) time.Time {
	end := max(e.EndedMS, e.AckedMS)
	t := now
	if end > 0 {
		t = ms(end)
	}
	if t.Before(start) {
		t = start
	}
	return t
}

func annotations(e *store.Episode, pageBase string) map[string]string {
	state := "active"
	if !e.Active {
		state = "ended"
	}
	an := map[string]string{
		"summary": e.Device + ": " + e.Condition + ", " + e.Priority + " priority alarm " + state,
		"onset":   rfc(ms(e.OnsetMS)),
		"caution": caution.Text,
	}
	if e.MinSpO2 >= 0 {
		an["spo2_min"] = strconv.FormatFloat(e.MinSpO2, 'f', -1, 64) + " %"
	}
	if e.Limit != 0 {
		an["limit"] = strconv.FormatFloat(e.Limit, 'f', -1, 64)
	}
	if e.AckedBy != "" {
		an["acknowledged_by"] = e.AckedBy
	}
	if e.Profile != "" {
		an["profile"] = e.Profile
	}
	if pageBase != "" {
		an["device_page"] = strings.TrimRight(pageBase, "/") + "/device/" + url.PathEscape(e.Device)
	}
	return an
}

// LabelName turns a device label key into a valid Prometheus label name
// ([a-zA-Z_][a-zA-Z0-9_]*): every other character becomes '_', a leading
// digit gets a '_' before it, and a name starting with "__" (reserved for
// Prometheus's own use) gets "label" before it. It returns "" for "".
func LabelName(k string) string {
	if k == "" {
		return ""
	}
	b := []byte(k)
	for i, c := range b {
		if !(c == '_' || c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9') {
			b[i] = '_'
		}
	}
	s := string(b)
	if s[0] >= '0' && s[0] <= '9' {
		s = "_" + s
	}
	if strings.HasPrefix(s, "__") {
		s = "label" + s
	}
	return s
}

func ms(v int64) time.Time { return time.UnixMilli(v).UTC() }

func rfc(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }

// LateAnnotation is the annotation that marks an alert delivered late:
// its episode had already ended (at the time it gives) when the alert
// first reached this Alertmanager.
const LateAnnotation = "delivered_late"

// Late turns the resolved alert of an ended episode (Build's first alert)
// into a firing one, for an Alertmanager that never had it firing: an
// alert that arrives already resolved is never notified, so the alarm
// would be lost to whoever is on duty. It fires until until (endsAt in the
// future; the resolution is sent before that) and says in its summary and
// in LateAnnotation that the episode ended at its end time and that this
// is a late delivery.
func Late(resolved Alert, until time.Time) Alert {
	a := resolved
	an := make(map[string]string, len(resolved.Annotations)+1)
	for k, v := range resolved.Annotations {
		an[k] = v
	}
	ended := resolved.EndsAt
	an[LateAnnotation] = "this alarm episode already ended at " + ended + "; the gateway could not deliver it to Alertmanager before then, so it is sent late, as firing, and resolved a little later"
	an["summary"] += " (delivered late: ended at " + ended + ")"
	a.Annotations = an
	a.EndsAt = rfc(until)
	return a
}
