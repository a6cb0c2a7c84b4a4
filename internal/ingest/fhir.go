package ingest

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"mime"
	"net/http"
	"net/url"
	"regexp"
	"slices"
	"strings"
	"sync"
	"time"

	ppb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/patient_go_proto"

	"filtrate/fhir"
	"filtrate/hl7v2"
	"filtrate/internal/forward"
	"filtrate/internal/pipeline"
	"filtrate/internal/telemetry"
	"filtrate/store"
)

// PatientSource looks up a Patient by logical id. It returns an error
// wrapping fhir.ErrPatientNotFound when the source has no such Patient.
// Errors never contain the id or any other patient data.
type PatientSource interface {
	Patient(ctx context.Context, id string) (*ppb.Patient, error)
}

// FHIR handles FHIR R4 requests: POST [base] with a Bundle, POST
// [base]/Observation with one Observation, and GET [base]/metadata. Like
// the HL7 v2 handler it answers only after the audit records (and the
// outbox item, when forwarding) are durable.
type FHIR struct {
	Proc  *pipeline.Processor
	State func() *State
	Codec *fhir.Codec
	// Patients looks up subjects the request does not hold; nil: such a
	// request is refused (422).
	Patients PatientSource
	Metrics  *telemetry.Metrics // may be nil
	Logger   *slog.Logger       // never receives patient data
	Notify   func()             // wakes the FHIR forwarder after a commit; may be nil
	// Version is filtrate's version, written into Provenance.
	Version string
	// Site names the laboratory in the CapabilityStatement.
	Site string
	// CodeEntries returns the recognised codes for the
	// CapabilityStatement; nil means hl7v2.DefaultCodeEntries.
	CodeEntries func() []hl7v2.CodeEntry
	// Started is the CapabilityStatement's date; zero means now.
	Started time.Time
	Now     func() time.Time
	// History, when set, lets a correction of one input withdraw eGFRs
	// made earlier with another input of the same specimen.
	History HistorySource
	// Sent, when set, is the record of the eGFRs sent per order or
	// specimen: later withdrawals address exactly what was sent.
	Sent ReportedSource
}

// FHIRProcessed is what handling one FHIR request produced.
type FHIRProcessed struct {
	// Status is the HTTP status answered and Code its acknowledgement
	// class for metrics: AA for 2xx, AR for 4xx, AE for 5xx.
	Status int
	Code   string
	// Body is the answer: a Bundle, or an OperationOutcome when refused.
	Body []byte
	// Forwarded is the transaction Bundle put in the outbox; nil when
	// refused or not forwarding.
	Forwarded []byte
	Evaluated []pipeline.Evaluated
	Duplicate bool
	// RecordIDs are the audit record IDs (store.Receipt.RecordIDs).
	RecordIDs []int64
	// Err is why the request was refused; no patient data.
	Err error
}

func (h *FHIR) now() time.Time {
	if h.Now != nil {
		return h.Now()
	}
	return time.Now()
}

func (h *FHIR) logger() *slog.Logger {
	if h.Logger != nil {
		return h.Logger
	}
	return slog.New(slog.DiscardHandler)
}

// ackCode maps an HTTP status to the acknowledgement class of the metrics.
func ackCode(status int) string {
	switch {
	case status >= 500:
		return hl7v2.AckError
	case status >= 400:
		return hl7v2.AckReject
	default:
		return hl7v2.AckAccept
	}
}

// Handle processes one request body posted to at and returns the answer.
// It never answers 2xx before the audit records and the outbox item are
// durable, answers 4xx (and records nothing) for a request that cannot be
// accepted as it is, and 5xx only when filtrate or a source it depends on
// failed, in which case the sender should retry.
func (h *FHIR) Handle(ctx context.Context, at fhir.Endpoint, body []byte) (p FHIRProcessed) {
	start := h.now()
	defer func() {
		p.Code = ackCode(p.Status)
		if h.Metrics != nil {
			h.Metrics.Received.WithLabelValues(DestinationFHIR).Inc()
			h.Metrics.Acknowledged.WithLabelValues(DestinationFHIR, p.Code).Inc()
			h.Metrics.Processing.WithLabelValues(DestinationFHIR).Observe(h.now().Sub(start).Seconds())
		}
	}()
	req, err := h.Codec.Decode(body, at)
	if err != nil {
		return h.refuse(err)
	}
	st := h.State()
	opts := fhir.ExtractOptions{Codes: st.Codes, Location: st.Location, Equations: st.registry()}
	if h.Patients != nil {
		opts.LookupPatient = func(id string) (*ppb.Patient, error) { return h.Patients.Patient(ctx, id) }
	}
	x, err := req.Extract(opts)
	if err != nil {
		return h.refuse(err)
	}
	pm := neutralFHIR(req, x, body)
	evals := h.Proc.Evaluate(pm, st.Snapshot)
	res := make([]fhir.GroupResult, len(evals))
	for i, e := range evals {
		res[i].Outcome = e.Outcome
		ws, err := fhirWithdrawals(ctx, h.History, h.Sent, st, x, x.Groups[i], e)
		if err != nil {
			h.logger().Error("fhir request not processed: record of sent eGFRs unavailable; answered 503", "err", err)
			return h.fail(http.StatusServiceUnavailable, "transient", "the request could not be processed; retry later", err)
		}
		res[i].Withdrawals = ws
		gk := FHIRGroupKey(e.Group)
		for _, w := range res[i].Withdrawals {
			evals[i].Withdrawals = append(evals[i].Withdrawals, pipeline.WithdrawnEGFR{
				Equation: w.Equation, AssumedSex: w.AssumedSex, SourceID: w.SourceID, Status: w.Status, Cause: withdrawalCause(w.Status)})
			if gk != "" && w.ID != "" {
				evals[i].Reported = append(evals[i].Reported, store.Reported{Key: "fhir|" + w.ID, GroupKey: gk,
					Equation: w.Equation, AssumedSex: w.AssumedSex, ExternalID: w.ID, MessageID: pm.MessageID})
			}
		}
		if gk != "" {
			for _, r := range e.Outcome.Results {
				id := x.ResultID(x.Groups[i], &evals[i].Outcome, r)
				ins := x.ResultInputs(x.Groups[i], &evals[i].Outcome, r)
				slices.Sort(ins)
				evals[i].Reported = append(evals[i].Reported, store.Reported{Key: "fhir|" + id, GroupKey: gk,
					Equation: r.Equation, AssumedSex: r.AssumedSex, ExternalID: id, Inputs: strings.Join(ins, ","),
					Active: true, MessageID: pm.MessageID})
			}
		}
	}
	meta := fhir.Meta{Now: h.now(), SoftwareVersion: h.Version, ConfigHash: st.Snapshot.ConfigHash}
	var (
		outs      []pipeline.Output
		forwarded []byte
	)
	if st.ForwardFHIR {
		id, payload, err := h.Codec.Forward(x, res, meta)
		if err != nil {
			h.logger().Error("fhir: building the forwarded bundle failed", "err", err)
			return h.fail(http.StatusInternalServerError, "exception", "internal error while adding eGFR; retry later", err)
		}
		forwarded = payload
		// Reports of one patient go out in order; a request with nothing
		// to calculate (no patient group) is ordered with all such.
		partition := "fhir:no-patient"
		for _, g := range pm.Groups {
			if g.PatientID != "" {
				partition = g.PatientID
				break
			}
		}
		outs = append(outs, pipeline.Output{Destination: DestinationFHIR, PartitionKey: partition,
			MessageID: id, ContentType: fhir.MediaType, Payload: payload})
	}
	rcpt, err := h.Proc.Commit(ctx, pm, evals, st.Snapshot, outs)
	if err != nil {
		h.logger().Error("fhir request not recorded; answered 503", "err", err)
		return h.fail(http.StatusServiceUnavailable, "transient", "the request could not be recorded; retry later", err)
	}
	if h.Notify != nil && len(outs) > 0 && !rcpt.Duplicate {
		h.Notify()
	}
	meta.Duplicate = rcpt.Duplicate
	for i, ids := range ResultRecordIDs(evals, rcpt.RecordIDs) {
		res[i].RecordIDs = ids
	}
	answer, err := h.Codec.Response(x, res, meta)
	if err != nil {
		// Recorded, but the answer cannot be written: the sender's retry
		// is recognised as a duplicate and answered from the same records.
		h.logger().Error("fhir: writing the answer failed after commit", "err", err)
		return h.fail(http.StatusInternalServerError, "exception", "internal error while writing the answer; retry later", err)
	}
	return FHIRProcessed{Status: http.StatusOK, Body: answer, Forwarded: forwarded, Evaluated: evals,
		Duplicate: rcpt.Duplicate, RecordIDs: rcpt.RecordIDs}
}

// refuse answers an extraction or decoding error: 4xx for an *InputError,
// 503 for a failed patient lookup, 500 otherwise.
func (h *FHIR) refuse(err error) FHIRProcessed {
	var le *fhir.LookupError
	if errors.As(err, &le) {
		h.logger().Error("fhir patient lookup failed; answered 503", "err", err)
		return h.fail(http.StatusServiceUnavailable, "transient", "the patient source is unavailable; retry later", err)
	}
	var ie *fhir.InputError
	if errors.As(err, &ie) {
		h.logger().Warn("fhir request refused", "status", ie.Status, "err", err)
		body, merr := h.Codec.OperationOutcome(ie.Issues)
		if merr != nil {
			return FHIRProcessed{Status: ie.Status, Body: []byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"invalid"}]}`), Err: err}
		}
		return FHIRProcessed{Status: ie.Status, Body: body, Err: err}
	}
	h.logger().Error("fhir request failed", "err", err)
	return h.fail(http.StatusInternalServerError, "exception", "internal error; retry later", err)
}

func (h *FHIR) fail(status int, code, text string, err error) FHIRProcessed {
	body, merr := h.Codec.OperationOutcome([]fhir.Issue{{Severity: "error", Code: code, Details: text}})
	if merr != nil {
		body = []byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"exception"}]}`)
	}
	return FHIRProcessed{Status: status, Body: body, Err: err}
}

// ResultRecordIDs returns, per group, the audit record IDs of its results,
// from a receipt's RecordIDs in the order pipeline.Records writes them
// (per group: results, then refusals, then withdrawals). It returns nil
// groups when the count does not match.
func ResultRecordIDs(evals []pipeline.Evaluated, ids []int64) [][]int64 {
	out := make([][]int64, len(evals))
	n := 0
	for _, e := range evals {
		n += len(e.Outcome.Results) + len(e.Outcome.Refusals) + len(e.Group.Withdrawn)
	}
	if n != len(ids) {
		return out
	}
	k := 0
	for i, e := range evals {
		out[i] = ids[k : k+len(e.Outcome.Results)]
		k += len(e.Outcome.Results) + len(e.Outcome.Refusals) + len(e.Group.Withdrawn)
	}
	return out
}

// neutralFHIR turns an extraction into the pipeline's message.
func neutralFHIR(req *fhir.Request, x *fhir.Extraction, raw []byte) pipeline.Message {
	pm := pipeline.Message{Transport: DestinationFHIR, MessageID: req.MessageID(), DedupKey: req.DedupKey(), Raw: raw}
	for _, g := range x.Groups {
		pg := pipeline.Group{Key: g.Key, Request: g.Request,
			PatientID: g.Patient.ID, BirthDate: g.Patient.BirthDateText, Sex: g.Patient.Gender}
		if !g.Compute {
			pg.Request.Measurements = nil
		}
		for _, w := range g.Withdrawn {
			pg.Withdrawn = append(pg.Withdrawn, pipeline.Withdrawal{SourceID: w.SourceID, Analyte: w.Analyte, Status: w.Status})
		}
		pm.Groups = append(pm.Groups, pg)
	}
	if len(pm.Groups) > 0 {
		pm.PatientID, pm.BirthDate, pm.Sex = pm.Groups[0].PatientID, pm.Groups[0].BirthDate, pm.Groups[0].Sex
	}
	return pm
}

// ServeBundle serves POST [base]: a Bundle.
func (h *FHIR) ServeBundle(w http.ResponseWriter, r *http.Request) {
	h.serve(w, r, fhir.EndpointBundle)
}

// ServeObservation serves POST [base]/Observation: one Observation.
func (h *FHIR) ServeObservation(w http.ResponseWriter, r *http.Request) {
	h.serve(w, r, fhir.EndpointObservation)
}

// acceptedMediaTypes are the request media types taken as FHIR JSON.
var acceptedMediaTypes = map[string]bool{fhir.MediaType: true, "application/json": true, "application/json+fhir": true}

func (h *FHIR) serve(w http.ResponseWriter, r *http.Request, at fhir.Endpoint) {
	if mt, _, err := mime.ParseMediaType(r.Header.Get("Content-Type")); err != nil || !acceptedMediaTypes[mt] {
		h.write(w, h.early(http.StatusUnsupportedMediaType, fhir.Issue{Severity: "error", Code: "not-supported",
			Details: "unsupported Content-Type: send " + fhir.MediaType + " or application/json"}))
		return
	}
	body, err := io.ReadAll(r.Body)
	if err != nil {
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			h.write(w, h.early(http.StatusRequestEntityTooLarge, fhir.Issue{Severity: "error", Code: "too-long",
				Details: fmt.Sprintf("the request is larger than %d bytes", mbe.Limit)}))
			return
		}
		h.write(w, h.early(http.StatusBadRequest, fhir.Issue{Severity: "error", Code: "structure", Details: "the request body could not be read"}))
		return
	}
	h.write(w, h.Handle(r.Context(), at, body))
}

// early answers a request refused before it is decoded, counting it like
// any other.
func (h *FHIR) early(status int, is fhir.Issue) FHIRProcessed {
	h.logger().Warn("fhir request refused", "status", status, "reason", is.Details)
	body, err := h.Codec.OperationOutcome([]fhir.Issue{is})
	if err != nil {
		body = []byte(`{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"invalid"}]}`)
	}
	p := FHIRProcessed{Status: status, Code: ackCode(status), Body: body}
	if h.Metrics != nil {
		h.Metrics.Received.WithLabelValues(DestinationFHIR).Inc()
		h.Metrics.Acknowledged.WithLabelValues(DestinationFHIR, p.Code).Inc()
	}
	return p
}

func (h *FHIR) write(w http.ResponseWriter, p FHIRProcessed) {
	w.Header().Set("Content-Type", fhir.MediaType+"; charset=utf-8")
	if p.Status == http.StatusServiceUnavailable {
		w.Header().Set("Retry-After", "10")
	}
	w.WriteHeader(p.Status)
	_, _ = w.Write(p.Body)
}

// ServeMetadata serves GET [base]/metadata: the CapabilityStatement.
func (h *FHIR) ServeMetadata(w http.ResponseWriter, _ *http.Request) {
	entries := hl7v2.DefaultCodeEntries()
	if h.CodeEntries != nil {
		entries = h.CodeEntries()
	}
	date := h.Started
	if date.IsZero() {
		date = h.now()
	}
	body, err := h.Codec.CapabilityStatement(fhir.Capabilities{
		Version: h.Version, Site: h.Site, Date: date, Codes: entries, Outputs: h.State().Outputs,
	})
	if err != nil {
		h.logger().Error("fhir: writing the capability statement failed", "err", err)
		h.write(w, h.fail(http.StatusInternalServerError, "exception", "internal error", err))
		return
	}
	h.write(w, FHIRProcessed{Status: http.StatusOK, Body: body})
}

// fhirID is the syntax of a FHIR logical id (FHIR R4 datatypes, id).
var fhirID = regexp.MustCompile(`^[A-Za-z0-9\-.]{1,64}$`)

// maxFHIRAnswer bounds what is read of a FHIR server's answer.
const maxFHIRAnswer = 1 << 20

// FHIRPatients looks Patients up at a FHIR server (GET [base]/Patient/[id])
// and keeps them for TTL. It is safe for concurrent use.
type FHIRPatients struct {
	Base   string
	Client *http.Client // nil: http.DefaultClient
	Codec  *fhir.Codec
	// TTL is how long a Patient is reused; 0: not cached.
	TTL time.Duration
	// Timeout bounds one lookup; default 10 s.
	Timeout time.Duration
	// MaxEntries bounds the cache; default 1024.
	MaxEntries int
	Now        func() time.Time

	mu    sync.Mutex
	cache map[string]cachedPatient
}

type cachedPatient struct {
	p       *ppb.Patient
	expires time.Time
}

func (s *FHIRPatients) now() time.Time {
	if s.Now != nil {
		return s.Now()
	}
	return time.Now()
}

// Patient returns the Patient with logical id id.
func (s *FHIRPatients) Patient(ctx context.Context, id string) (*ppb.Patient, error) {
	if !fhirID.MatchString(id) {
		return nil, fmt.Errorf("patient source: malformed id: %w", fhir.ErrPatientNotFound)
	}
	if p := s.cached(id); p != nil {
		return p, nil
	}
	timeout := s.Timeout
	if timeout <= 0 {
		timeout = 10 * time.Second
	}
	ctx, cancel := context.WithTimeout(ctx, timeout)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, strings.TrimRight(s.Base, "/")+"/Patient/"+id, nil)
	if err != nil {
		return nil, fmt.Errorf("patient source: build request: %w", stripURL(err))
	}
	req.Header.Set("Accept", fhir.MediaType)
	client := s.Client
	if client == nil {
		client = http.DefaultClient
	}
	resp, err := client.Do(req)
	if err != nil {
		return nil, fmt.Errorf("patient source: %w", stripURL(err))
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(io.LimitReader(resp.Body, maxFHIRAnswer))
	if err != nil {
		return nil, fmt.Errorf("patient source: read answer: %w", stripURL(err))
	}
	switch {
	case resp.StatusCode == http.StatusNotFound || resp.StatusCode == http.StatusGone:
		return nil, fmt.Errorf("patient source answered HTTP %d: %w", resp.StatusCode, fhir.ErrPatientNotFound)
	case resp.StatusCode != http.StatusOK:
		return nil, fmt.Errorf("patient source answered HTTP %d", resp.StatusCode)
	}
	p, err := s.Codec.DecodePatient(body)
	if err != nil {
		// Not wrapped: the sender's request is not at fault. The text
		// names elements, never values.
		return nil, fmt.Errorf("patient source answered an invalid Patient: %s", err)
	}
	s.store(id, p)
	return p, nil
}

func (s *FHIRPatients) cached(id string) *ppb.Patient {
	if s.TTL <= 0 {
		return nil
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	c, ok := s.cache[id]
	if !ok {
		return nil
	}
	if !s.now().Before(c.expires) {
		delete(s.cache, id)
		return nil
	}
	return c.p
}

func (s *FHIRPatients) store(id string, p *ppb.Patient) {
	if s.TTL <= 0 {
		return
	}
	max := s.MaxEntries
	if max <= 0 {
		max = 1024
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cache == nil {
		s.cache = map[string]cachedPatient{}
	}
	now := s.now()
	if len(s.cache) >= max {
		for k, c := range s.cache {
			if !now.Before(c.expires) {
				delete(s.cache, k)
			}
		}
		for k := range s.cache {
			if len(s.cache) < max {
				break
			}
			delete(s.cache, k) // arbitrary eviction when every entry is fresh
		}
	}
	s.cache[id] = cachedPatient{p: p, expires: now.Add(s.TTL)}
}

// stripURL drops the URL from a *url.Error (it may hold a patient id),
// keeping the operation and the cause.
func stripURL(err error) error {
	var ue *url.Error
	if errors.As(err, &ue) {
		return fmt.Errorf("%s: %w", ue.Op, ue.Err)
	}
	return err
}

// FHIRSender delivers outbox items (transaction Bundles) to a FHIR server
// by POST [base]. A 2xx answer is delivery; 4xx other than 408 and 429 is
// a final refusal (forward.RejectedError, parked for a person); 408, 429,
// 5xx and network errors are retried.
type FHIRSender struct {
	Base string
	// Token, when set, is sent as a bearer token.
	Token  string
	Client *http.Client // nil: http.DefaultClient
}

// Send implements forward.Sender.
func (s *FHIRSender) Send(ctx context.Context, it store.OutboxItem) (string, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, s.Base, bytes.NewReader(it.Payload))
	if err != nil {
		return "", fmt.Errorf("fhir forward: build request: %w", stripURL(err))
	}
	ct := it.ContentType
	if ct == "" {
		ct = fhir.MediaType
	}
	req.Header.Set("Content-Type", ct)
	req.Header.Set("Accept", fhir.MediaType)
	if s.Token != "" {
		req.Header.Set("Authorization", "Bearer "+s.Token)
	}
	client := s.Client
	if client == nil {
		client = http.DefaultClient
	}
	resp, err := client.Do(req)
	if err != nil {
		return "", fmt.Errorf("fhir forward: %w", stripURL(err))
	}
	defer resp.Body.Close()
	_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, maxFHIRAnswer))
	code := resp.StatusCode
	switch {
	case code >= 200 && code < 300:
		return fmt.Sprintf("HTTP %d %s", code, it.MessageID), nil
	case code == http.StatusRequestTimeout || code == http.StatusTooManyRequests || code >= 500:
		return "", fmt.Errorf("fhir forward: downstream answered HTTP %d", code)
	case code == http.StatusUnauthorized || code == http.StatusForbidden || code == http.StatusNotFound ||
		code == http.StatusMethodNotAllowed || code == http.StatusUnsupportedMediaType:
		// These say the forwarding set-up is wrong (token, URL, server),
		// not this message: retry, so that fixing the set-up delivers
		// everything in order, and let the alerts show the failures.
		return "", fmt.Errorf("fhir forward: downstream refused the connection set-up (HTTP %d): check fhir.forward and its token", code)
	case code >= 400:
		return "", &forward.RejectedError{Reason: fmt.Sprintf("HTTP %d", code)}
	default:
		return "", fmt.Errorf("fhir forward: downstream answered HTTP %d", code)
	}
}
