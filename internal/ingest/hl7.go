package ingest

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"sync/atomic"
	"time"

	"filtrate/calc"
	"filtrate/hl7v2"
	"filtrate/internal/pipeline"
	"filtrate/internal/telemetry"
	"filtrate/store"
)

// HL7 handles HL7 v2 ORU^R01 messages: it implements mllp.Handler.
type HL7 struct {
	Proc    *pipeline.Processor
	State   func() *State
	Metrics *telemetry.Metrics // may be nil
	Logger  *slog.Logger       // never receives patient data
	Notify  func()             // wakes the HL7 v2 forwarder after a commit; may be nil
	Limits  hl7v2.Limits
	Now     func() time.Time
	// Timeout bounds recording one message (default DefaultTimeout).
	Timeout time.Duration
	// History, when set, lets a correction of one input withdraw eGFRs
	// made earlier with another input of the same specimen.
	History HistorySource
	// Sent, when set, is the record of the eGFRs sent per order or
	// specimen: later withdrawals address exactly what was sent.
	Sent ReportedSource

	seq atomic.Uint64
}

// Processed is what handling one message produced.
type Processed struct {
	Code      string // AA, AE or AR
	Ack       []byte
	Enriched  []byte // the message as forwarded; nil when refused
	Evaluated []pipeline.Evaluated
	Duplicate bool
	Err       error // why the message was refused (AE/AR); no patient data
}

// ServeMLLP answers one MLLP frame.
func (h *HL7) ServeMLLP(ctx context.Context, payload []byte) []byte {
	return h.Handle(ctx, payload).Ack
}

func (h *HL7) now() time.Time {
	if h.Now != nil {
		return h.Now()
	}
	return time.Now()
}

func (h *HL7) logger() *slog.Logger {
	if h.Logger != nil {
		return h.Logger
	}
	return slog.New(slog.DiscardHandler)
}

// ackID returns a control ID for an acknowledgement.
func (h *HL7) ackID() string {
	return fmt.Sprintf("FLT%d%06d", h.now().UTC().Unix(), h.seq.Add(1)%1000000)
}

// Handle processes one message and returns the acknowledgement to send. It
// never panics on bad input and never acknowledges AA before the audit
// records and the outbox item are durable.
func (h *HL7) Handle(ctx context.Context, payload []byte) (p Processed) {
	start := h.now()
	if h.Metrics != nil {
		h.Metrics.Received.WithLabelValues("hl7v2").Inc()
		defer func() {
			h.Metrics.Acknowledged.WithLabelValues("hl7v2", p.Code).Inc()
			h.Metrics.Processing.WithLabelValues("hl7v2").Observe(h.now().Sub(start).Seconds())
		}()
	}
	msg, err := hl7v2.ParseLimits(payload, h.Limits)
	if err != nil {
		header, _ := hl7v2.ParseMSH(payload) // nil when even MSH is unusable
		detail := hl7v2.ErrorDetail{Code: hl7v2.ErrCodeApplication, Text: "message could not be parsed"}
		var pe *hl7v2.ParseError
		if errors.As(err, &pe) {
			detail = hl7v2.ErrorDetail{Code: pe.Code(), Location: pe.Location(), Text: pe.Error()}
		}
		h.logger().Warn("hl7v2 message rejected: parse error", "err", err)
		return h.refuse(header, hl7v2.AckReject, detail, err)
	}
	if code, event, _ := msg.Type(); code != "ORU" || (event != "R01" && event != "") {
		return h.refuse(msg, hl7v2.AckReject, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeUnsupportedType, Location: "MSH^1^9",
			Text: "unsupported message type: only ORU^R01 is accepted"}, errors.New("unsupported message type"))
	}
	if msg.ControlID() == "" {
		// Without a control ID a message can neither be acknowledged to its
		// sender nor told apart from the next one.
		return h.refuse(msg, hl7v2.AckReject, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeRequiredField, Location: "MSH^1^10",
			Text: "MSH-10 message control ID is required"}, errors.New("no message control ID"))
	}
	st := h.State()
	oru, err := hl7v2.ExtractORU(msg, hl7v2.ExtractOptions{Codes: st.Codes, Location: st.Location})
	if err != nil {
		return h.refuse(msg, hl7v2.AckReject, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeApplication, Text: "observation result could not be read"}, err)
	}
	pm, index := neutral(oru, payload)
	// A sender that reuses a control ID (a counter reset) for a different
	// report must not have it dropped as a duplicate: the key also covers
	// the message body (every segment after MSH, so a resend with a new
	// MSH-7 time is still recognised as the same message).
	pm.DedupKey += "|" + bodyHash(msg)
	evals := h.Proc.Evaluate(pm, st.Snapshot)
	outcomes := make([]*calc.Outcome, len(oru.Orders))
	for i, e := range evals {
		o := e.Outcome
		outcomes[index[i]] = &o
	}
	withdrawals, err := hl7Withdrawals(ctx, h.History, h.Sent, st, oru, pm, evals, index)
	if err != nil {
		h.logger().Error("hl7v2 message not processed: record of sent eGFRs unavailable; answered AE", "err", err)
		return h.refuse(msg, hl7v2.AckError, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeApplication, Text: "message could not be processed; resend later"}, err)
	}
	keys := HL7GroupKeys(oru)
	for i := range evals {
		gk := keys[index[i]]
		for _, w := range withdrawals[index[i]] {
			evals[i].Withdrawals = append(evals[i].Withdrawals, pipeline.WithdrawnEGFR{
				Equation: w.Equation, AssumedSex: w.AssumedSex, SourceID: w.SourceID, Status: w.Status, Cause: withdrawalCause(w.Status)})
			if gk != "" {
				evals[i].Reported = append(evals[i].Reported, store.Reported{Key: HL7ObservationKey(gk, w.Equation, w.AssumedSex),
					GroupKey: gk, Equation: w.Equation, AssumedSex: w.AssumedSex, MessageID: pm.MessageID})
			}
		}
		if gk != "" {
			for _, r := range evals[i].Outcome.Results {
				evals[i].Reported = append(evals[i].Reported, store.Reported{Key: HL7ObservationKey(gk, r.Equation, r.AssumedSex),
					GroupKey: gk, Equation: r.Equation, AssumedSex: r.AssumedSex, Active: true, MessageID: pm.MessageID})
			}
		}
	}
	enriched, err := oru.Enrich(outcomes, hl7v2.EnrichOptions{Withdrawals: withdrawals})
	if err != nil {
		h.logger().Error("hl7v2 enrichment failed", "err", err)
		return h.refuse(msg, hl7v2.AckError, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeApplication, Text: "internal error while adding eGFR; resend later"}, err)
	}
	out := enriched.Encode()
	var outs []pipeline.Output
	if st.ForwardHL7 {
		// Reports of one patient go out in order; a report without a
		// patient identifier is ordered with everything from its sender.
		partition := pm.PatientID
		if partition == "" {
			partition = "sender:" + msg.MSH().Field(3).String() + "|" + msg.MSH().Field(4).String()
		}
		outs = append(outs, pipeline.Output{Destination: DestinationHL7, PartitionKey: partition,
			MessageID: pm.MessageID, ContentType: "application/hl7-v2", Payload: out})
	}
	cctx, cancel := context.WithTimeout(ctx, h.timeout())
	defer cancel()
	rcpt, err := h.Proc.Commit(cctx, pm, evals, st.Snapshot, outs)
	switch {
	case errors.Is(err, store.ErrInvalid):
		// Resending the same message would fail the same way.
		h.logger().Error("hl7v2 message cannot be recorded as sent; answered AR", "err", err)
		return h.refuse(msg, hl7v2.AckReject, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeApplication, Text: "message cannot be recorded as sent"}, err)
	case err != nil:
		h.logger().Error("hl7v2 message not recorded; answered AE", "err", err)
		return h.refuse(msg, hl7v2.AckError, hl7v2.ErrorDetail{Code: hl7v2.ErrCodeApplication, Text: "message could not be recorded; resend later"}, err)
	}
	if h.Notify != nil && len(outs) > 0 && !rcpt.Duplicate {
		h.Notify()
	}
	ack := hl7v2.BuildACK(msg, hl7v2.AckAccept, "", "", h.ackID(), h.now())
	return Processed{Code: hl7v2.AckAccept, Ack: ack.Encode(), Enriched: out, Evaluated: evals, Duplicate: rcpt.Duplicate}
}

// DefaultTimeout bounds recording one message; past it the sender gets AE
// and may resend (a resend of a message that was recorded after all is a
// duplicate and changes nothing).
const DefaultTimeout = 30 * time.Second

func (h *HL7) timeout() time.Duration {
	if h.Timeout > 0 {
		return h.Timeout
	}
	return DefaultTimeout
}

func (h *HL7) refuse(msg *hl7v2.Message, code string, d hl7v2.ErrorDetail, err error) Processed {
	ack := hl7v2.BuildACKDetail(msg, code, d, h.ackID(), h.now())
	return Processed{Code: code, Ack: ack.Encode(), Err: err}
}

// neutral turns an extracted ORU into the pipeline's message. Orders with
// no kidney-function input are left out; index maps each group back to its
// order.
func neutral(oru *hl7v2.ORU, raw []byte) (pipeline.Message, []int) {
	msg := oru.Message()
	msh := msg.MSH()
	pm := pipeline.Message{
		Transport: "hl7v2",
		MessageID: oru.ControlID,
		DedupKey:  "hl7v2|" + msh.Field(3).String() + "|" + msh.Field(4).String() + "|" + oru.ControlID,
		Raw:       raw,
	}
	if len(oru.Patients) > 0 {
		pm.PatientID, pm.BirthDate, pm.Sex = patientFields(oru, oru.Patients[0])
	}
	var index []int
	for i, ord := range oru.Orders {
		g := pipeline.Group{Key: fmt.Sprintf("OBR%d", ord.Index)}
		for _, obx := range ord.Observations {
			switch obx.Analyte {
			case calc.Creatinine, calc.CystatinC, calc.UrineCreatinine:
				// Deleted, wrong (D, W) and cancelled (X) inputs withdraw
				// the eGFRs derived from them (see planWithdrawals).
				if a := hl7v2.ClassifyStatus(obx.Status); a == hl7v2.StatusRetract || a == hl7v2.StatusCancel {
					g.Withdrawn = append(g.Withdrawn, pipeline.Withdrawal{SourceID: obx.SourceID, Analyte: obx.Analyte, Status: obx.Status})
				}
			}
		}
		compute := oru.NeedsCalculation(i)
		if !compute && len(g.Withdrawn) == 0 {
			continue
		}
		// The order's own height and weight, else the same patient's
		// elsewhere in the message; day-precision dates only.
		g.Request = oru.Request(i)
		if !compute {
			g.Request.Measurements = nil
		}
		if ord.Patient != nil && len(oru.Patients) > 1 {
			g.PatientID, g.BirthDate, g.Sex = patientFields(oru, ord.Patient)
		}
		pm.Groups = append(pm.Groups, g)
		index = append(index, i)
	}
	return pm, index
}

// patientFields returns the patient identifier (CX-1 with its assigning
// authority, as ID^^^AUTHORITY), and date of birth and sex as received.
func patientFields(oru *hl7v2.ORU, p *hl7v2.Patient) (id, birth, sex string) {
	id = p.ID
	if p.AssigningAuthority != "" {
		id += "^^^" + p.AssigningAuthority
	}
	// Patients are listed one per PID segment, in message order.
	k := 0
	for _, seg := range oru.Message().Segments() {
		if seg.Name() != "PID" {
			continue
		}
		if k < len(oru.Patients) && oru.Patients[k] == p {
			birth = seg.Field(7).String()
			break
		}
		k++
	}
	return id, birth, p.SexCode
}

// bodyHash is the hex SHA-256 of a message's segments after MSH.
func bodyHash(msg *hl7v2.Message) string {
	h := sha256.New()
	for i := 1; i < msg.Len(); i++ {
		h.Write([]byte(msg.Segment(i).String()))
		h.Write([]byte{'\r'})
	}
	return hex.EncodeToString(h.Sum(nil))
}
