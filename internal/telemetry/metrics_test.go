package telemetry

import (
	"context"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/stretchr/testify/require"
)

func TestNewCreatesBoundedSeriesUpFront(t *testing.T) {
	reg := prometheus.NewPedanticRegistry()
	m := New(reg, "1.2.3", []string{"ckd-epi-2021-cr"}, []string{"unit-unknown"})
	require.Equal(t, 0.0, testutil.ToFloat64(m.Results.WithLabelValues("ckd-epi-2021-cr")))
	m.Acknowledged.WithLabelValues("hl7v2", "AA").Inc()
	require.Equal(t, 1.0, testutil.ToFloat64(m.Acknowledged.WithLabelValues("hl7v2", "AA")))
	n, err := testutil.GatherAndCount(reg, "filtrate_ingest_messages_acknowledged_total")
	require.NoError(t, err)
	require.Equal(t, len(Transports)*len(AckCodes), n)
	require.NoError(t, testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP filtrate_calc_refusals_total Values not computed, by reason code.
# TYPE filtrate_calc_refusals_total counter
filtrate_calc_refusals_total{reason="unit-unknown"} 0
`), "filtrate_calc_refusals_total"))
	// A second registration on the same registry is a programming error.
	require.Panics(t, func() { New(reg, "x", nil, nil) })
}

func TestOutboxCollector(t *testing.T) {
	reg := prometheus.NewPedanticRegistry()
	fail := false
	c := NewOutboxCollector(func(context.Context) ([]OutboxStat, error) {
		if fail {
			return nil, errors.New("store down")
		}
		return []OutboxStat{{Destination: "hl7v2", Pending: 3, OldestPending: 90 * time.Second, Parked: 1}}, nil
	})
	reg.MustRegister(c)
	require.NoError(t, testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP filtrate_outbox_pending Enriched messages waiting for delivery, by destination kind.
# TYPE filtrate_outbox_pending gauge
filtrate_outbox_pending{destination="fhir"} 0
filtrate_outbox_pending{destination="hl7v2"} 3
# HELP filtrate_outbox_oldest_pending_seconds Age of the oldest message waiting for delivery, by destination kind.
# TYPE filtrate_outbox_oldest_pending_seconds gauge
filtrate_outbox_oldest_pending_seconds{destination="fhir"} 0
filtrate_outbox_oldest_pending_seconds{destination="hl7v2"} 90
# HELP filtrate_outbox_parked Messages the downstream system rejected, parked for a person, by destination kind.
# TYPE filtrate_outbox_parked gauge
filtrate_outbox_parked{destination="fhir"} 0
filtrate_outbox_parked{destination="hl7v2"} 1
`), "filtrate_outbox_pending", "filtrate_outbox_oldest_pending_seconds", "filtrate_outbox_parked"))
	fail = true
	require.NoError(t, testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP filtrate_outbox_scrape_success Whether reading the outbox state from the store succeeded.
# TYPE filtrate_outbox_scrape_success gauge
filtrate_outbox_scrape_success 0
`), "filtrate_outbox_scrape_success"))
}
