// Package notify delivers alarm episodes to Prometheus Alertmanager.
//
// The store keeps an outbox (internal/store, outbox.go): when it is on,
// every announced episode the gateway writes (announcement, escalation,
// end, acknowledgement) queues a notification in the same transaction, so
// no durable episode change lacks one. A Notifier goes through the outbox
// and posts each episode's current state to every configured Alertmanager
// (POST /api/v2/alerts, the JSON of Alertmanager's API v2), one goroutine
// per Alertmanager, and an entry leaves the outbox only when every
// Alertmanager answered 2xx for its latest change. A failed request is
// retried with a doubling backoff (1 s to 30 s by default); a restart of
// the gateway or of Alertmanager delays delivery but loses nothing. A
// notification may be delivered more than once (after a crash between the
// answer and the store update, and by the periodic resend); Alertmanager
// deduplicates alerts by their labels, which carry the episode id.
//
// What an alert says is built by Build from the stored episode and device:
// labels alertname, device, condition, priority (low, medium, high),
// model, gateway, episode and the device's own labels (LabelName makes
// them valid label names); annotations with the lowest SpO2 since onset,
// the limit, the onset time, a link to the device page and the caution
// that pulsefleet is not a certified alarm. startsAt is the announcement;
// endsAt is set once the episode ended (or its latched signal was
// acknowledged), which resolves the alert. Active alerts are sent again
// every Options.Resend (1 minute), well within Alertmanager's
// resolve_timeout (5 minutes by default), because Alertmanager resolves a
// firing alert without endsAt that is not repeated in time.
//
// Alertmanager never notifies an alert that reaches it already resolved.
// So an ended episode that an Alertmanager never had firing (it was
// unreachable, or the gateway down, from announcement to end) is first
// sent to it firing, by Late: endsAt in the future, and the summary and
// the delivered_late annotation saying when the episode ended. The time
// that Alertmanager accepted it is kept in the outbox entry
// (OutboxEntry.Fired), and the resolution is sent only once the alert has
// been firing there for Options.Hold (2 minutes by default), so
// Alertmanager notifies it after its group_wait, also across a restart.
// The same hold applies to an episode that ends soon after an Alertmanager
// accepted it firing (the store keeps the firing times past the entry,
// until the end is delivered everywhere), since an alert resolved within
// its group's group_wait is never notified either. Until its resolution, a
// held alert is resent to that Alertmanager as firing (Late), so one that
// restarted meanwhile has it again.
//
// The client is a few lines of net/http and encoding/json over the
// documented API rather than Alertmanager's generated Go client, which
// would bring the go-openapi runtime and its dependencies into the
// gateway for one POST.
package notify
