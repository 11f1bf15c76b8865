package notify

import (
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// Metrics are the notifier's Prometheus series. They are registered even
// when no Alertmanager is configured (the outbox then stays empty and the
// gauges 0), so dashboards and the stuck-outbox rule find them everywhere.
type Metrics struct {
	queued   prometheus.Gauge
	sent     *prometheus.CounterVec
	resent   *prometheus.CounterVec
	failed   *prometheus.CounterVec
	oldestMS atomic.Int64 // QueuedMS of the oldest waiting notification, 0 when none
	now      atomic.Pointer[func() time.Time]
}

// NewMetrics registers the notifier's metrics with reg.
func NewMetrics(reg prometheus.Registerer) (*Metrics, error) {
	m := &Metrics{
		queued: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_notify_queued",
			Help: "Notifications in the outbox not yet accepted by every Alertmanager."}),
		sent: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_notify_sent_total",
			Help: "Alerts from the outbox that an Alertmanager accepted (answered 2xx), by Alertmanager URL."}, []string{"alertmanager"}),
		resent: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_notify_resent_total",
			Help: "Active alerts sent again so that Alertmanager keeps them firing, by Alertmanager URL."}, []string{"alertmanager"}),
		failed: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_notify_failed_total",
			Help: "Requests to an Alertmanager that failed (no answer or not 2xx) and will be retried, by Alertmanager URL."}, []string{"alertmanager"}),
	}
	now := time.Now
	m.now.Store(&now)
	oldest := prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "pulsefleet_notify_oldest_unsent_age_seconds",
		Help: "Age of the oldest notification not yet accepted by every Alertmanager; 0 when the outbox is empty."},
		func() float64 {
			q := m.oldestMS.Load()
			if q == 0 {
				return 0
			}
			return max(0, float64((*m.now.Load())().UnixMilli()-q)/1000)
		})
	for _, c := range []prometheus.Collector{m.queued, m.sent, m.resent, m.failed, oldest} {
		if err := reg.Register(c); err != nil {
			return nil, err
		}
	}
	return m, nil
}
