// Package pipeline is the one code path from a neutral request to a durable
// audit record, shared by every transport: it evaluates each calculation
// group under the configuration snapshot in force, turns the outcomes into
// audit records and result-history points, and commits them together with
// the enriched outbound message in one store transaction. Only after that
// commit may a transport acknowledge.
//
// Transports (HL7 v2, FHIR) translate to and from this package's types; they
// never decide clinical questions, and this package never parses a wire
// format.
package pipeline

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"strings"
	"time"
	"unicode/utf8"

	"filtrate/calc"
	"filtrate/internal/telemetry"
	"filtrate/store"
)

// Snapshot is the configuration in force for one message. A reload builds a
// new Snapshot completely and swaps it in; a message is processed under the
// one snapshot it started with.
type Snapshot struct {
	Policy       calc.Policy
	Calibrations []calc.CalibrationRule
	ConfigHash   string
}

// Acceptor is the part of the store the pipeline writes to.
type Acceptor interface {
	Accept(ctx context.Context, sub store.Submission) (store.Receipt, error)
}

// Withdrawal is an input result whose status withdraws it (HL7 v2 OBX-11
// D or W, FHIR entered-in-error or cancelled): no eGFR is computed, and any
// eGFR derived from it earlier is withdrawn with it.
type Withdrawal struct {
	SourceID string
	Analyte  calc.Analyte
	Status   string // the status as received
}

// Group is one calculation unit: the results of one specimen (an HL7 v2 OBR
// group, a set of FHIR Observations sharing patient and collection time).
type Group struct {
	Key string
	// Request holds sex, date of birth, collection time and measurements;
	// the pipeline adds the policy and calibration rules.
	Request calc.Request
	// Withdrawn lists inputs withdrawn by their status.
	Withdrawn []Withdrawal
	// PatientID, BirthDate and Sex, when PatientID is set, override the
	// message's patient for this group (a message carrying several
	// patients).
	PatientID string
	BirthDate string
	Sex       string
}

func (g Group) patient(msg Message) (id, birth, sex string) {
	if g.PatientID != "" {
		return g.PatientID, g.BirthDate, g.Sex
	}
	return msg.PatientID, msg.BirthDate, msg.Sex
}

// Message is one received message in neutral form.
type Message struct {
	Transport string // "hl7v2" or "fhir"
	MessageID string // control ID / Bundle identifier
	DedupKey  string // identifies a resent copy
	Raw       []byte // the message as received (only its hash is stored)
	// Patient data as received, for the audit trail.
	PatientID string
	BirthDate string
	Sex       string
	Groups    []Group
}

// Evaluated is one group with the full request evaluated and its outcome.
type Evaluated struct {
	Group   Group
	Request calc.Request
	Outcome calc.Outcome
	// Withdrawals are the eGFRs sent earlier that this message withdraws
	// (filled by the transport after Evaluate); each gets an audit record.
	Withdrawals []WithdrawnEGFR
	// Reported is what this message sends (active) or withdraws, for the
	// record of what was sent (filled by the transport).
	Reported []store.Reported
}

// WithdrawnEGFR is one eGFR observation a message withdraws.
type WithdrawnEGFR struct {
	Equation   string
	AssumedSex string
	SourceID   string // the input whose status or correction withdraws it
	Status     string // the transport's status for the withdrawal
	Cause      string // plain-language reason, no patient data
}

// Output is an enriched message to forward.
type Output struct {
	Destination  string
	PartitionKey string
	MessageID    string
	ContentType  string
	Payload      []byte
}

// Processor evaluates and commits messages. It is safe for concurrent use.
type Processor struct {
	calc    *calc.Calculator
	store   Acceptor
	version string
	metrics *telemetry.Metrics
	now     func() time.Time
}

// NewProcessor returns a Processor. metrics may be nil.
func NewProcessor(c *calc.Calculator, s Acceptor, version string, m *telemetry.Metrics) *Processor {
	return &Processor{calc: c, store: s, version: version, metrics: m, now: time.Now}
}

// Evaluate runs the calculation for every group under snap. It is pure
// apart from reading snap.
func (p *Processor) Evaluate(msg Message, snap *Snapshot) []Evaluated {
	out := make([]Evaluated, 0, len(msg.Groups))
	for _, g := range msg.Groups {
		req := g.Request
		req.Policy = snap.Policy
		req.Calibrations = snap.Calibrations
		out = append(out, Evaluated{Group: g, Request: req, Outcome: p.calc.Evaluate(req)})
	}
	return out
}

// Commit makes a processed message durable: its audit records, history
// points and outbound messages, in one transaction. The transport may
// acknowledge once Commit returns without error. A resent copy (same
// DedupKey) changes nothing and returns a Receipt with Duplicate set.
func (p *Processor) Commit(ctx context.Context, msg Message, evals []Evaluated, snap *Snapshot, outs []Output) (store.Receipt, error) {
	outputID := ""
	if len(outs) > 0 {
		outputID = outs[0].MessageID
	}
	recs, err := Records(msg, evals, snap, p.version, outputID)
	if err != nil {
		return store.Receipt{}, err
	}
	sub := store.Submission{DedupKey: key(msg.DedupKey), Records: recs, History: History(msg, evals)}
	for _, e := range evals {
		for _, r := range e.Reported {
			r.Key, r.GroupKey, r.MessageID = key(r.Key), key(r.GroupKey), clean(r.MessageID)
			sub.Reported = append(sub.Reported, r)
		}
	}
	for _, o := range outs {
		sub.Outbox = append(sub.Outbox, store.OutboxMessage{
			Destination: o.Destination, PartitionKey: key(o.PartitionKey), MessageID: clean(o.MessageID),
			ContentType: o.ContentType, Payload: o.Payload,
		})
	}
	start := p.now()
	rcpt, err := p.store.Accept(ctx, sub)
	if err != nil {
		return store.Receipt{}, fmt.Errorf("pipeline: commit message: %w", err)
	}
	if p.metrics != nil {
		p.metrics.StoreWrite.Observe(p.now().Sub(start).Seconds())
		if !rcpt.Duplicate {
			for _, e := range evals {
				for _, r := range e.Outcome.Results {
					p.metrics.Results.WithLabelValues(r.Equation).Inc()
				}
				for _, r := range e.Outcome.Refusals {
					p.metrics.Refusals.WithLabelValues(string(r.Code)).Inc()
				}
			}
		}
	}
	return rcpt, nil
}

// RawHash returns the hex SHA-256 of a raw message.
func RawHash(raw []byte) string {
	s := sha256.Sum256(raw)
	return hex.EncodeToString(s[:])
}

// Suppression codes the pipeline adds to calc's reasons.
const (
	// ReasonWithdrawn marks an input withdrawn by its status.
	ReasonWithdrawn = "input-withdrawn"
	// ReasonEGFRWithdrawn marks an eGFR sent earlier that this message
	// withdraws (its input was corrected, deleted or cancelled).
	ReasonEGFRWithdrawn = "egfr-withdrawn"
)

// Records builds the audit records for a processed message: one per
// computed value, one per refusal and one per withdrawn input, each holding
// the full request so it can be recomputed without the original message.
func Records(msg Message, evals []Evaluated, snap *Snapshot, version, outputMessageID string) ([]store.AuditRecord, error) {
	var recs []store.AuditRecord
	rawHash := RawHash(msg.Raw)
	for _, e := range evals {
		reqJSON, err := json.Marshal(e.Request)
		if err != nil {
			return nil, fmt.Errorf("pipeline: encode request of group %s: %w", e.Group.Key, err)
		}
		inputs, err := json.Marshal(e.Outcome.Inputs)
		if err != nil {
			return nil, fmt.Errorf("pipeline: encode inputs of group %s: %w", e.Group.Key, err)
		}
		pid, birth, sex := e.Group.patient(msg)
		base := store.AuditRecord{
			Transport: msg.Transport, MessageID: clean(msg.MessageID), RawHash: rawHash,
			PatientID: clean(pid), BirthDate: clean(birth), Sex: clean(sex),
			CollectedAt: e.Request.CollectedAt, Inputs: inputs,
			Policy: e.Outcome.Policy, PolicyVersion: e.Outcome.PolicyVersion,
			ConfigHash: snap.ConfigHash, SoftwareVersion: version,
			OutputMessageID: clean(outputMessageID), Request: reqJSON,
		}
		for _, r := range e.Outcome.Results {
			steps, err := json.Marshal(r.Steps)
			if err != nil {
				return nil, fmt.Errorf("pipeline: encode steps of group %s: %w", e.Group.Key, err)
			}
			rec := base
			exact := r.Exact
			rec.Equation, rec.EquationVersion, rec.Steps = r.Equation, r.EquationVersion, steps
			rec.Exact, rec.Reported, rec.Unit, rec.Category = &exact, r.Reported, r.Unit, r.Category
			rec.Comments = r.Comments
			if r.AssumedSex != "" {
				rec.Comments = append([]string{"assumed sex: " + r.AssumedSex}, r.Comments...)
			}
			recs = append(recs, rec)
		}
		for _, r := range e.Outcome.Refusals {
			rec := base
			rec.Equation = r.Equation
			rec.Steps = json.RawMessage("[]")
			rec.SuppressionCode, rec.SuppressionText = string(r.Code), r.Message
			recs = append(recs, rec)
		}
		for _, w := range e.Withdrawals {
			rec := base
			rec.Equation = w.Equation
			rec.Steps = json.RawMessage("[]")
			rec.SuppressionCode = ReasonEGFRWithdrawn
			rec.SuppressionText = fmt.Sprintf("eGFR %s withdrawn (status %s): %s", w.Equation, w.Status, w.Cause)
			if w.AssumedSex != "" {
				rec.Comments = []string{"assumed sex: " + w.AssumedSex}
			}
			recs = append(recs, rec)
		}
		for _, w := range e.Group.Withdrawn {
			rec := base
			rec.Steps = json.RawMessage("[]")
			rec.SuppressionCode = ReasonWithdrawn
			rec.SuppressionText = fmt.Sprintf("The %s result was withdrawn (status %s): no eGFR is reported, and an eGFR derived from it earlier is withdrawn with it.", w.Analyte, w.Status)
			recs = append(recs, rec)
		}
	}
	return recs, nil
}

// History returns the usable creatinine and cystatin C values of a message,
// in canonical units, for the per-patient result history.
func History(msg Message, evals []Evaluated) []store.HistoryPoint {
	var pts []store.HistoryPoint
	for _, e := range evals {
		pid, _, _ := e.Group.patient(msg)
		if pid == "" || e.Request.CollectedAt.IsZero() {
			continue
		}
		for _, in := range e.Outcome.Inputs {
			if in.Analyte != calc.Creatinine && in.Analyte != calc.CystatinC || !in.Accepted {
				continue
			}
			pts = append(pts, store.HistoryPoint{
				PatientID: clean(pid), Analyte: string(in.Analyte), Value: in.Used,
				Unit: in.UsedUnit, CollectedAt: e.Request.CollectedAt, MessageID: clean(msg.MessageID),
			})
		}
	}
	return pts
}

// clean makes text received from a sender storable: invalid UTF-8 (a
// Latin-1 sender, say) becomes U+FFFD and NUL bytes are dropped. A message
// must never be refused for ever because of its character set; the raw hash
// keeps the exact bytes received.
func clean(s string) string {
	if utf8.ValidString(s) && !strings.ContainsRune(s, 0) {
		return s
	}
	return strings.ToValidUTF8(strings.ReplaceAll(s, "\x00", ""), "\uFFFD")
}

// StorageKey is the form in which a key is stored (see Commit): callers
// that look a stored key up must use it too.
func StorageKey(s string) string { return key(s) }

// key makes an identifying key storable without merging different keys: a
// key that clean would change is replaced by its hash.
func key(s string) string {
	if clean(s) == s {
		return s
	}
	h := sha256.Sum256([]byte(s))
	return "sha256:" + hex.EncodeToString(h[:])
}
