package ingest

import (
	"math"

	"github.com/prometheus/client_golang/prometheus"
)

// metrics are the ingest path's Prometheus series. Labels are bounded:
// reasons, modes, conditions and priorities are fixed sets. Only the four
// pulsefleet_device_* gauges carry a device label (one series per known
// device each); they are refreshed when /metrics is served
// (RefreshDeviceSeries) and deleted once a device has been silent for
// longer than the trend retention.
type metrics struct {
	connected        prometheus.Gauge
	streams          *prometheus.CounterVec // by outcome of the stream's end
	messages         *prometheus.CounterVec // accepted data messages by mode
	samples          prometheus.Counter
	rejected         *prometheus.CounterVec // by reason
	duplicates       prometheus.Counter
	lost             prometheus.Counter
	late             prometheus.Counter
	replaced         prometheus.Counter
	panics           prometheus.Counter
	trendPoints      *prometheus.CounterVec // by source
	estimatorSeconds *prometheus.CounterVec // by outcome: valid | withheld
	estimatorFlags   *prometheus.CounterVec // by flag
	commitSeconds    prometheus.Histogram
	batchRecords     prometheus.Histogram
	durableSeconds   prometheus.Histogram
	writerQueue      prometheus.Gauge
	storeErrors      prometheus.Counter
	discarded        prometheus.Counter // accepted messages not written: an earlier batch of their device failed
	carryDropped     prometheus.Counter
	sendStalls       prometheus.Counter
	alarmsActive     *prometheus.GaugeVec   // by condition, priority
	announcements    *prometheus.CounterVec // by condition, priority
	episodeEvents    *prometheus.CounterVec // by transition
	watchers         prometheus.Gauge
	watchDropped     prometheus.Counter
	storeBytes       prometheus.GaugeFunc

	// per device (label "device")
	devConnected *prometheus.GaugeVec
	devValidSpO2 *prometheus.GaugeVec
	devDrift     *prometheus.GaugeVec
	devBattery   *prometheus.GaugeVec
}

func newMetrics(reg prometheus.Registerer, storeSize func() float64) (*metrics, error) {
	m := &metrics{
		connected: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_devices_connected",
			Help: "Devices with an open ingest stream."}),
		streams: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_streams_ended_total",
			Help: "Ingest streams that ended, by how they ended."}, []string{"outcome"}),
		messages: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_messages_received_total",
			Help: "Data messages (raw chunks or summaries) accepted, by mode."}, []string{"mode"}),
		samples: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_samples_received_total",
			Help: "Raw sample pairs accepted."}),
		rejected: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_messages_rejected_total",
			Help: "Device messages rejected, by reason."}, []string{"reason"}),
		duplicates: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_messages_duplicate_total",
			Help: "Data messages whose sequence number was not above the last accepted one (never stored twice)."}),
		lost: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_messages_lost_total",
			Help: "Sequence numbers skipped by devices (data never received)."}),
		late: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_messages_late_total",
			Help: "Accepted data messages whose device time was far behind the gateway clock."}),
		replaced: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_streams_replaced_total",
			Help: "Streams closed because the same device opened a new one."}),
		panics: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_stream_panics_total",
			Help: "Panics recovered inside a device stream (the stream ended, the gateway went on)."}),
		trendPoints: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_trend_points_total",
			Help: "Trend points produced, by source (gateway estimate or device summary)."}, []string{"source"}),
		estimatorSeconds: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_estimator_seconds_total",
			Help: "Seconds estimated from raw streams, by whether SpO2 was valid or withheld."}, []string{"outcome"}),
		estimatorFlags: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_estimator_flagged_seconds_total",
			Help: "Estimated seconds carrying a flag, by flag."}, []string{"flag"}),
		commitSeconds: prometheus.NewHistogram(prometheus.HistogramOpts{Name: "pulsefleet_store_commit_duration_seconds",
			Help: "Time to commit one batch to the store.", Buckets: prometheus.ExponentialBuckets(0.0005, 2, 14)}),
		batchRecords: prometheus.NewHistogram(prometheus.HistogramOpts{Name: "pulsefleet_store_batch_records",
			Help: "Records per committed batch.", Buckets: prometheus.ExponentialBuckets(1, 4, 9)}),
		durableSeconds: prometheus.NewHistogram(prometheus.HistogramOpts{Name: "pulsefleet_ingest_to_durable_seconds",
			Help: "Time from receiving a data message to its batch being durable.", Buckets: prometheus.ExponentialBuckets(0.001, 2, 14)}),
		writerQueue: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_store_queue_records",
			Help: "Records waiting for the store writer."}),
		storeErrors: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_store_write_errors_total",
			Help: "Batches the store failed to commit (their messages were not acknowledged)."}),
		discarded: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_store_discarded_messages_total",
			Help: "Accepted data messages not written nor acknowledged because an earlier batch of their device failed (the device resends them)."}),
		carryDropped: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_store_carry_dropped_records_total",
			Help: "Episode, session and audit records of failed batches dropped because too many waited for the store."}),
		sendStalls: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_stream_send_stalls_total",
			Help: "Device streams ended because the device did not read its answers in time."}),
		alarmsActive: prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "pulsefleet_alarms_active",
			Help: "Announced, not yet ended (or latched) alarm episodes, by condition and priority."}, []string{"condition", "priority"}),
		announcements: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_alarm_announcements_total",
			Help: "Alarm conditions announced (after their delay), by condition and priority."}, []string{"condition", "priority"}),
		episodeEvents: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "pulsefleet_alarm_transitions_total",
			Help: "Alarm episode transitions, by transition."}, []string{"transition"}),
		watchers: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_watchers",
			Help: "Open live-event subscriptions (gRPC watches and web pages)."}),
		watchDropped: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_watch_events_dropped_total",
			Help: "Live events dropped because a watcher was too slow."}),
	}
	m.devConnected = prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "pulsefleet_device_connected",
		Help: "1 while the device has an open ingest stream, 0 otherwise (one series per known device)."}, []string{"device"})
	m.devValidSpO2 = prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "pulsefleet_device_valid_spo2_ratio",
		Help: "Share of the device's last 300 trend seconds with a valid SpO2, 0..1 (absent before its first second)."}, []string{"device"})
	m.devDrift = prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "pulsefleet_device_clock_drift_ppm",
		Help: "Device clock drift against the gateway clock, parts per million, positive when the device runs fast (absent until 5 minutes of observations)."}, []string{"device"})
	m.devBattery = prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "pulsefleet_device_battery_ratio",
		Help: "Last battery charge the device reported, 0..1 (absent when unknown)."}, []string{"device"})
	m.storeBytes = prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "pulsefleet_store_size_bytes",
		Help: "Size of the store file."}, storeSize)
	cs := []prometheus.Collector{m.connected, m.streams, m.messages, m.samples, m.rejected, m.duplicates, m.lost,
		m.late, m.replaced, m.panics, m.trendPoints, m.estimatorSeconds, m.estimatorFlags, m.commitSeconds,
		m.batchRecords, m.durableSeconds, m.writerQueue, m.storeErrors, m.discarded, m.carryDropped, m.sendStalls, m.alarmsActive, m.announcements,
		m.episodeEvents, m.watchers, m.watchDropped, m.storeBytes,
		m.devConnected, m.devValidSpO2, m.devDrift, m.devBattery}
	for _, c := range cs {
		if err := reg.Register(c); err != nil {
			return nil, err
		}
	}
	return m, nil
}

// deviceSeries sets a device's labelled gauges; a NaN value removes that
// series (the figure is unknown).
func (m *metrics) deviceSeries(id string, connected bool, validShare, driftPPM, batteryRatio float64) {
	c := 0.0
	if connected {
		c = 1
	}
	m.devConnected.WithLabelValues(id).Set(c)
	for _, s := range []struct {
		v   *prometheus.GaugeVec
		val float64
	}{{m.devValidSpO2, validShare}, {m.devDrift, driftPPM}, {m.devBattery, batteryRatio}} {
		if math.IsNaN(s.val) {
			s.v.DeleteLabelValues(id)
		} else {
			s.v.WithLabelValues(id).Set(s.val)
		}
	}
}

// deleteDevice removes every series labelled with the device.
func (m *metrics) deleteDevice(id string) {
	for _, v := range []*prometheus.GaugeVec{m.devConnected, m.devValidSpO2, m.devDrift, m.devBattery} {
		v.DeleteLabelValues(id)
	}
}
