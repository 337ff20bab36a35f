package alert

import (
	"errors"

	"github.com/prometheus/client_golang/prometheus"
)

// metrics are the dispatcher's Prometheus collectors.
type metrics struct {
	events    *prometheus.CounterVec // outcome: new | duplicate | suppressed | orphan | rejected | bad_severity
	submitted *prometheus.CounterVec // receiver
	delivered *prometheus.CounterVec
	retried   *prometheus.CounterVec
	failed    *prometheus.CounterVec
	pending   *prometheus.GaugeVec
	latency   *prometheus.HistogramVec
}

func newMetrics(reg prometheus.Registerer) (*metrics, error) {
	m := &metrics{
		events: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "events_total",
			Help: "Events submitted to the alert dispatcher, by outcome (new, duplicate, suppressed, orphan, rejected, bad_severity).",
		}, []string{"outcome"}),
		submitted: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "submitted_total",
			Help: "Alert deliveries written to the outbox, per receiver.",
		}, []string{"receiver"}),
		delivered: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "delivered_total",
			Help: "Alert deliveries acknowledged by the receiver, per receiver.",
		}, []string{"receiver"}),
		retried: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "retries_total",
			Help: "Failed delivery attempts that will be retried, per receiver.",
		}, []string{"receiver"}),
		failed: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "failed_total",
			Help: "Deliveries given up (moved to the failed list), per receiver.",
		}, []string{"receiver"}),
		pending: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "pending",
			Help: "Deliveries waiting in the outbox, per receiver.",
		}, []string{"receiver"}),
		latency: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Namespace: "holomix", Subsystem: "alert", Name: "delivery_latency_seconds",
			Help:    "Time from writing an alert to the outbox to its acknowledged delivery, per receiver.",
			Buckets: []float64{0.005, 0.01, 0.05, 0.1, 0.5, 1, 5, 10, 30, 60, 300, 600, 1800, 3600, 21600},
		}, []string{"receiver"}),
	}
	if reg == nil {
		return m, nil
	}
	var err error
	m.events = register(reg, m.events, &err)
	m.submitted = register(reg, m.submitted, &err)
	m.delivered = register(reg, m.delivered, &err)
	m.retried = register(reg, m.retried, &err)
	m.failed = register(reg, m.failed, &err)
	m.pending = register(reg, m.pending, &err)
	m.latency = register(reg, m.latency, &err)
	return m, err
}

// register adds c to reg; when an identical collector is already registered
// (a dispatcher reopened in the same process) the existing one is reused.
func register[C prometheus.Collector](reg prometheus.Registerer, c C, errp *error) C {
	if err := reg.Register(c); err != nil {
		var are prometheus.AlreadyRegisteredError
		if errors.As(err, &are) {
			if existing, ok := are.ExistingCollector.(C); ok {
				return existing
			}
		}
		if *errp == nil {
			*errp = err
		}
	}
	return c
}
