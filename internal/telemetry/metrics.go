// Package telemetry holds filtrate's Prometheus metrics. Metrics live in a
// struct built from an injected prometheus.Registerer (a fresh registry per
// test); every label value is bounded and created up front, and no label ever
// carries patient data.
package telemetry

import (
	"context"
	"runtime"
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// Transports, acknowledgement codes and destinations: the only label values
// used for those labels.
var (
	Transports   = []string{"hl7v2", "fhir"}
	AckCodes     = []string{"AA", "AE", "AR"}
	Destinations = []string{"hl7v2", "fhir"}
	Outcomes     = []string{"sent", "retry", "parked"}
	Listeners    = []string{"hl7v2", "http"}
)

// Metrics is the set of filtrate's own metrics.
type Metrics struct {
	Received        *prometheus.CounterVec
	Acknowledged    *prometheus.CounterVec
	Processing      *prometheus.HistogramVec
	Results         *prometheus.CounterVec
	Refusals        *prometheus.CounterVec
	StoreWrite      prometheus.Histogram
	ForwardAttempts *prometheus.CounterVec
	Connections     *prometheus.GaugeVec
	ReloadOK        prometheus.Gauge
	ReloadTime      prometheus.Gauge
	BuildInfo       *prometheus.GaugeVec
}

// New registers filtrate's metrics with reg. equations and reasons are the
// known equation IDs and refusal codes; their series are created at zero so
// that rates work from the first scrape.
func New(reg prometheus.Registerer, version string, equations, reasons []string) *Metrics {
	m := &Metrics{
		Received: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "filtrate_ingest_messages_received_total",
			Help: "Messages received, by transport.",
		}, []string{"transport"}),
		Acknowledged: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "filtrate_ingest_messages_acknowledged_total",
			Help: "Messages acknowledged, by transport and code (AA accepted, AE error the sender may retry, AR rejected). FHIR answers map to the same codes: 2xx AA, 5xx AE, 4xx AR.",
		}, []string{"transport", "code"}),
		Processing: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name:    "filtrate_ingest_processing_seconds",
			Help:    "Time from receiving a message to acknowledging it.",
			Buckets: []float64{.001, .0025, .005, .01, .025, .05, .1, .25, .5, 1, 2.5, 5, 10},
		}, []string{"transport"}),
		Results: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "filtrate_calc_results_total",
			Help: "Values computed and recorded, by equation.",
		}, []string{"equation"}),
		Refusals: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "filtrate_calc_refusals_total",
			Help: "Values not computed, by reason code.",
		}, []string{"reason"}),
		StoreWrite: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "filtrate_store_write_seconds",
			Help:    "Time to make one message durable (audit records, outbox item, history) in the store.",
			Buckets: []float64{.0005, .001, .0025, .005, .01, .025, .05, .1, .25, .5, 1, 2.5},
		}),
		ForwardAttempts: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "filtrate_forward_attempts_total",
			Help: "Delivery attempts to downstream systems, by destination kind and outcome.",
		}, []string{"destination", "outcome"}),
		Connections: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "filtrate_listener_connections_open",
			Help: "Open connections, by listener.",
		}, []string{"listener"}),
		ReloadOK: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "filtrate_config_last_reload_successful",
			Help: "Whether the last configuration reload succeeded (1) or failed and the previous configuration was kept (0).",
		}),
		ReloadTime: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "filtrate_config_last_reload_success_timestamp_seconds",
			Help: "Time of the last successful configuration load, in seconds since the Unix epoch.",
		}),
		BuildInfo: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "filtrate_build_info",
			Help: "Build information; the value is always 1.",
		}, []string{"version", "goversion"}),
	}
	reg.MustRegister(m.Received, m.Acknowledged, m.Processing, m.Results, m.Refusals, m.StoreWrite,
		m.ForwardAttempts, m.Connections, m.ReloadOK, m.ReloadTime, m.BuildInfo)
	for _, t := range Transports {
		m.Received.WithLabelValues(t)
		m.Processing.WithLabelValues(t)
		for _, c := range AckCodes {
			m.Acknowledged.WithLabelValues(t, c)
		}
	}
	for _, e := range equations {
		m.Results.WithLabelValues(e)
	}
	for _, r := range reasons {
		m.Refusals.WithLabelValues(r)
	}
	for _, d := range Destinations {
		for _, o := range Outcomes {
			m.ForwardAttempts.WithLabelValues(d, o)
		}
	}
	for _, l := range Listeners {
		m.Connections.WithLabelValues(l)
	}
	m.BuildInfo.WithLabelValues(version, runtime.Version()).Set(1)
	return m
}

// OutboxStat is one destination's outbox state.
type OutboxStat struct {
	Destination   string
	Pending       int
	OldestPending time.Duration
	Parked        int
}

// OutboxCollector exposes the outbox state read from the store at scrape
// time, so that several daemons sharing one database report the same truth.
type OutboxCollector struct {
	stats   func(context.Context) ([]OutboxStat, error)
	timeout time.Duration
	pending *prometheus.Desc
	oldest  *prometheus.Desc
	parked  *prometheus.Desc
	up      *prometheus.Desc
}

// NewOutboxCollector returns a collector over stats.
func NewOutboxCollector(stats func(context.Context) ([]OutboxStat, error)) *OutboxCollector {
	return &OutboxCollector{
		stats:   stats,
		timeout: 2 * time.Second,
		pending: prometheus.NewDesc("filtrate_outbox_pending", "Enriched messages waiting for delivery, by destination kind.", []string{"destination"}, nil),
		oldest:  prometheus.NewDesc("filtrate_outbox_oldest_pending_seconds", "Age of the oldest message waiting for delivery, by destination kind.", []string{"destination"}, nil),
		parked:  prometheus.NewDesc("filtrate_outbox_parked", "Messages the downstream system rejected, parked for a person, by destination kind.", []string{"destination"}, nil),
		up:      prometheus.NewDesc("filtrate_outbox_scrape_success", "Whether reading the outbox state from the store succeeded.", nil, nil),
	}
}

// Describe implements prometheus.Collector.
func (c *OutboxCollector) Describe(ch chan<- *prometheus.Desc) {
	ch <- c.pending
	ch <- c.oldest
	ch <- c.parked
	ch <- c.up
}

// Collect implements prometheus.Collector.
func (c *OutboxCollector) Collect(ch chan<- prometheus.Metric) {
	ctx, cancel := context.WithTimeout(context.Background(), c.timeout)
	defer cancel()
	stats, err := c.stats(ctx)
	if err != nil {
		ch <- prometheus.MustNewConstMetric(c.up, prometheus.GaugeValue, 0)
		return
	}
	ch <- prometheus.MustNewConstMetric(c.up, prometheus.GaugeValue, 1)
	seen := map[string]OutboxStat{}
	for _, s := range stats {
		seen[s.Destination] = s
	}
	for _, d := range Destinations {
		s := seen[d]
		ch <- prometheus.MustNewConstMetric(c.pending, prometheus.GaugeValue, float64(s.Pending), d)
		ch <- prometheus.MustNewConstMetric(c.oldest, prometheus.GaugeValue, s.OldestPending.Seconds(), d)
		ch <- prometheus.MustNewConstMetric(c.parked, prometheus.GaugeValue, float64(s.Parked), d)
	}
}
