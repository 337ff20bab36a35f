package ingest

import (
	"github.com/prometheus/client_golang/prometheus"
)

// Reason labels of holomix_messages_rejected_total besides the decoder's
// (Reasons): never rename one.
const (
	ReasonUnknownTopic = "unknown_topic" // a message on a topic no subscription matches
	ReasonInfluxReject = "influx_rejected"
)

// Metrics are the ingestion counters. Create them with NewMetrics on the
// daemon's registry (never the global default one).
type Metrics struct {
	MessagesReceived   prometheus.Counter
	ReadingsReceived   prometheus.Counter
	ReadingsCommitted  prometheus.Counter
	ReadingsStored     prometheus.Counter
	ReadingsDuplicate  prometheus.Counter
	MessagesRejected   *prometheus.CounterVec
	PointsRejected     prometheus.Counter
	DerivedStored      prometheus.Counter
	DeadLettersDropped prometheus.Counter
	CommitDuration     prometheus.Histogram
	CommitReadings     prometheus.Histogram
	WriteDuration      prometheus.Histogram
	WriteErrors        *prometheus.CounterVec
	Reconnects         prometheus.Counter
	BrokerConnected    prometheus.Gauge
	AcksPending        prometheus.Gauge
	BackPressure       prometheus.Gauge
	DBReachable        prometheus.Gauge
}

// NewMetrics creates the collectors and registers them on reg (nil: not
// registered, for tests). Every rejection reason is pre-registered at zero.
func NewMetrics(reg prometheus.Registerer) *Metrics {
	m := &Metrics{
		MessagesReceived: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_messages_received_total", Help: "MQTT messages received on subscribed topics."}),
		ReadingsReceived: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_received_total", Help: "Readings decoded from MQTT messages (a redelivered message counts again)."}),
		ReadingsCommitted: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_spooled_total", Help: "Readings committed to the durable spool."}),
		ReadingsStored: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_stored_total", Help: "Readings acknowledged by the database."}),
		ReadingsDuplicate: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_readings_duplicate_total", Help: "Exact duplicate readings (same site, sensor, depth, time and temperature) dropped, e.g. broker redeliveries."}),
		MessagesRejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "holomix_messages_rejected_total", Help: "Messages (and database-rejected points) sent to the dead-letter bucket, by reason."}, []string{"reason"}),
		PointsRejected: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_points_rejected_total", Help: "Points the database refused with HTTP 4xx (dead-lettered)."}),
		DerivedStored: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_derived_points_stored_total", Help: "Derived points (water_column, lake_event) acknowledged by the database."}),
		DeadLettersDropped: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_dead_letters_dropped_total", Help: "Oldest dead letters dropped because the bucket was full."}),
		CommitDuration: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "holomix_spool_commit_duration_seconds", Help: "Duration of one spool group commit (write and fsync).",
			Buckets: prometheus.ExponentialBuckets(0.00025, 2, 14)}),
		CommitReadings: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "holomix_spool_commit_readings", Help: "Readings per spool group commit.",
			Buckets: prometheus.ExponentialBuckets(1, 4, 9)}),
		WriteDuration: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "holomix_influx_write_duration_seconds", Help: "Duration of one successful database write request.",
			Buckets: prometheus.ExponentialBuckets(0.001, 2, 15)}),
		WriteErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "holomix_influx_write_errors_total", Help: "Failed database write requests, by class (network, server, client)."}, []string{"class"}),
		Reconnects: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "holomix_mqtt_reconnects_total", Help: "Connections to the broker after the first one."}),
		BrokerConnected: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "holomix_mqtt_connected", Help: "1 while connected to the broker."}),
		AcksPending: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "holomix_mqtt_acks_pending", Help: "Messages received and not yet acknowledged (waiting for the spool)."}),
		BackPressure: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "holomix_backpressure_active", Help: "1 while the spool is full and messages are not acknowledged."}),
		DBReachable: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "holomix_influx_reachable", Help: "1 when the last database request succeeded."}),
	}
	for _, r := range append(Reasons(), ReasonUnknownTopic, ReasonInfluxReject) {
		m.MessagesRejected.WithLabelValues(r)
	}
	for _, c := range []string{"network", "server", "client"} {
		m.WriteErrors.WithLabelValues(c)
	}
	if reg != nil {
		reg.MustRegister(m.MessagesReceived, m.ReadingsReceived, m.ReadingsCommitted, m.ReadingsStored,
			m.ReadingsDuplicate, m.MessagesRejected, m.PointsRejected, m.DerivedStored, m.DeadLettersDropped,
			m.CommitDuration, m.CommitReadings, m.WriteDuration, m.WriteErrors, m.Reconnects,
			m.BrokerConnected, m.AcksPending, m.BackPressure, m.DBReachable)
	}
	return m
}

// spoolCollector exports the spool's depth, size and age at scrape time.
type spoolCollector struct {
	s                                         *Spool
	pending, stored, derived, bytes, max, age *prometheus.Desc
	dead                                      *prometheus.Desc
}

// RegisterSpool registers gauges read from s at scrape time:
// holomix_spool_readings (waiting for the database), holomix_spool_readings_kept
// (in the file), holomix_spool_derived_points, holomix_spool_bytes,
// holomix_spool_max_bytes, holomix_spool_oldest_age_seconds and
// holomix_dead_letters.
func RegisterSpool(reg prometheus.Registerer, s *Spool) error {
	c := &spoolCollector{
		s:       s,
		pending: prometheus.NewDesc("holomix_spool_readings", "Readings in the spool not yet acknowledged by the database.", nil, nil),
		stored:  prometheus.NewDesc("holomix_spool_readings_kept", "Readings in the spool file (waiting for the database or for the detection checkpoint).", nil, nil),
		derived: prometheus.NewDesc("holomix_spool_derived_points", "Derived points in the spool waiting for the database.", nil, nil),
		bytes:   prometheus.NewDesc("holomix_spool_bytes", "Logical size of the spooled readings and points.", nil, nil),
		max:     prometheus.NewDesc("holomix_spool_max_bytes", "Spool size above which messages are no longer acknowledged.", nil, nil),
		age:     prometheus.NewDesc("holomix_spool_oldest_age_seconds", "Age of the oldest reading not yet in the database (0 when none).", nil, nil),
		dead:    prometheus.NewDesc("holomix_dead_letters", "Dead letters kept in the spool.", nil, nil),
	}
	return reg.Register(c)
}

func (c *spoolCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{c.pending, c.stored, c.derived, c.bytes, c.max, c.age, c.dead} {
		ch <- d
	}
}

func (c *spoolCollector) Collect(ch chan<- prometheus.Metric) {
	st, err := c.s.Stats()
	if err != nil {
		ch <- prometheus.NewInvalidMetric(c.age, err)
	} else {
		ch <- prometheus.MustNewConstMetric(c.age, prometheus.GaugeValue, st.OldestPending.Seconds())
	}
	ch <- prometheus.MustNewConstMetric(c.pending, prometheus.GaugeValue, float64(st.Pending))
	ch <- prometheus.MustNewConstMetric(c.stored, prometheus.GaugeValue, float64(st.Stored))
	ch <- prometheus.MustNewConstMetric(c.derived, prometheus.GaugeValue, float64(st.Derived))
	ch <- prometheus.MustNewConstMetric(c.bytes, prometheus.GaugeValue, float64(st.Bytes))
	ch <- prometheus.MustNewConstMetric(c.max, prometheus.GaugeValue, float64(st.MaxBytes))
	ch <- prometheus.MustNewConstMetric(c.dead, prometheus.GaugeValue, float64(st.DeadLetters))
}
