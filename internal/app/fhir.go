package app

import (
	"fmt"
	"net/http"
	"time"

	"filtrate/config"
	"filtrate/fhir"
	"filtrate/hl7v2"
	"filtrate/internal/forward"
	"filtrate/internal/ingest"
)

// fhirSendTimeout bounds one delivery to the downstream FHIR server.
const fhirSendTimeout = 30 * time.Second

// fhirLookupTimeout bounds one Patient lookup at the patient source.
const fhirLookupTimeout = 10 * time.Second

// setupFHIR mounts the FHIR endpoints on the HTTP listener (through
// App.routes, so the listener's authentication applies) and, when
// fhir.forward is set, starts an outbox worker that delivers the enriched
// transaction Bundles there.
func (a *App) setupFHIR(cfg *config.Config) error {
	codec, err := fhir.NewCodec()
	if err != nil {
		return fmt.Errorf("fhir: %w", err)
	}
	h := &ingest.FHIR{
		Proc:    a.proc,
		State:   a.State,
		Codec:   codec,
		Metrics: a.metrics,
		Logger:  a.log.With("listener", "fhir"),
		Version: a.opts.Version,
		Site:    cfg.Site,
		CodeEntries: func() []hl7v2.CodeEntry {
			return codeEntries(a.Config())
		},
		Started: time.Now(),
		History: a.store,
		Sent:    a.store,
	}
	if cfg.FHIR.PatientSource != "" {
		h.Patients = &ingest.FHIRPatients{
			Base:    cfg.FHIR.PatientSource,
			Client:  &http.Client{},
			Codec:   codec,
			TTL:     cfg.FHIR.PatientCacheTTL,
			Timeout: fhirLookupTimeout,
		}
	}
	if cfg.FHIR.Forward != "" {
		w := &forward.Worker{
			Destination: ingest.DestinationFHIR,
			Name:        a.opts.WorkerName,
			Outbox:      a.store,
			Sender:      &ingest.FHIRSender{Base: cfg.FHIR.Forward, Token: cfg.FHIR.ForwardToken(), Client: noRedirects()},
			Backoff:     forward.Backoff{Initial: cfg.FHIR.Retry.Initial, Max: cfg.FHIR.Retry.Max},
			Poll:        a.opts.ForwardPoll,
			SendTimeout: fhirSendTimeout,
			Metrics:     a.metrics,
			Logger:      a.log,
		}
		w.Init()
		a.workers = append(a.workers, w)
		h.Notify = w.Notify
	}
	a.routes = append(a.routes,
		route{pattern: "POST /fhir", handler: http.HandlerFunc(h.ServeBundle)},
		route{pattern: "POST /fhir/{$}", handler: http.HandlerFunc(h.ServeBundle)},
		route{pattern: "POST /fhir/Observation", handler: http.HandlerFunc(h.ServeObservation)},
		route{pattern: "GET /fhir/metadata", handler: http.HandlerFunc(h.ServeMetadata)},
	)
	return nil
}

// codeEntries lists the codes the configuration recognises: the LOINC
// defaults, then the configured local codes.
func codeEntries(cfg *config.Config) []hl7v2.CodeEntry {
	entries := hl7v2.DefaultCodeEntries()
	for _, c := range cfg.Analytes {
		entries = append(entries, hl7v2.CodeEntry{System: c.System, Code: c.Code, Analyte: c.Analyte, Unit: c.Unit})
	}
	return entries
}

// noRedirects returns an HTTP client that does not follow redirects: Go's
// client turns a redirected POST into a body-less GET, whose 2xx (a login
// page behind a proxy, say) would count as delivery. A 3xx is retried
// instead, and shows in the metrics.
func noRedirects() *http.Client {
	return &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
}
