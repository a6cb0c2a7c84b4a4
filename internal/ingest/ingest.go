// Package ingest receives messages from the transports, runs them through
// the pipeline, and answers only once the result is durable: an HL7 v2
// acknowledgement over MLLP (AA after commit, AE when processing failed and
// the sender may retry, AR for what can never be accepted), and, for FHIR,
// the HTTP answer.
package ingest

import (
	"context"
	"filtrate/store"
	"fmt"
	"slices"
	"strings"
	"time"

	"filtrate/calc"
	"filtrate/config"
	"filtrate/fhir"
	"filtrate/hl7v2"
	"filtrate/internal/pipeline"
)

// State is the configuration-derived state one message is processed under.
// A reload builds a new State completely and swaps it in.
type State struct {
	Snapshot *pipeline.Snapshot
	// Codes maps HL7 v2 OBX-3 codes (and FHIR codings) to analytes.
	Codes *hl7v2.CodeMap
	// Location is the zone of HL7 v2 times sent without a UTC offset.
	Location *time.Location
	// Equations is the registry the withdrawal rules read equation names,
	// units, LOINC codes and sex dependence from; nil means
	// calc.Builtin().
	Equations *calc.Registry
	// Outputs are the eGFR observations the policy can report, listed in
	// the FHIR CapabilityStatement.
	Outputs []calc.Result
	// ForwardHL7 and ForwardFHIR tell whether enriched messages go
	// downstream (an outbox item per message) for each transport.
	ForwardHL7  bool
	ForwardFHIR bool
}

// Destination names used in the outbox; they are also metric label values.
const (
	DestinationHL7  = "hl7v2"
	DestinationFHIR = "fhir"
)

// OutputTemplates lists, for a policy, one template per eGFR observation
// it can report (by equation): equation, name, unit, the analytes used and
// the LOINC code as calc assigns it.
func OutputTemplates(p calc.Policy, reg *calc.Registry) []calc.Result {
	seen := map[string]bool{}
	var out []calc.Result
	for _, b := range p.Bands {
		for _, id := range bandEquations(b) {
			if seen[id] {
				continue
			}
			e, ok := reg.Latest(id)
			if !ok {
				continue
			}
			seen[id] = true
			r := calc.Result{Equation: e.ID, EquationName: e.Name, Unit: e.Unit, Uses: e.Uses()}
			r.LOINC, r.LOINCName = loincOf(p, e)
			out = append(out, r)
		}
	}
	return out
}

// bandEquations lists the equation IDs a band may report.
func bandEquations(b calc.Band) []string {
	var ids []string
	for _, id := range append([]string{b.Creatinine, b.CystatinC, b.Combined}, b.Extra...) {
		if id != "" {
			ids = append(ids, id)
		}
	}
	return ids
}

// loincOf is the output code of an equation under a policy, chosen as
// calc chooses it: the policy's override (named with the equation's name),
// else the equation's own code, else the policy's generic code.
func loincOf(p calc.Policy, e calc.Equation) (code, name string) {
	if c, ok := p.LOINC[e.ID]; ok && c != "" {
		return c, e.Name
	}
	if e.LOINC != "" {
		return e.LOINC, e.LOINCName
	}
	return p.GenericLOINC, p.GenericLOINCName
}

// StateFromConfig derives everything a message is processed under from a
// configuration.
func StateFromConfig(cfg *config.Config, reg *calc.Registry) (*State, error) {
	pol, err := cfg.Policy()
	if err != nil {
		return nil, fmt.Errorf("policy: %w", err)
	}
	codes, err := CodeMap(cfg)
	if err != nil {
		return nil, err
	}
	loc, err := cfg.Location()
	if err != nil {
		return nil, fmt.Errorf("timezone: %w", err)
	}
	return &State{
		Snapshot:    &pipeline.Snapshot{Policy: pol, Calibrations: cfg.Calibrations(), ConfigHash: cfg.Hash()},
		Codes:       codes,
		Location:    loc,
		Equations:   reg,
		Outputs:     OutputTemplates(pol, reg),
		ForwardHL7:  cfg.HL7v2.Forward != "",
		ForwardFHIR: cfg.FHIR.Forward != "",
	}, nil
}

// CodeMap builds the analyte code map: the built-in LOINC codes plus the
// configured local codes (a local entry overrides a built-in one).
func CodeMap(cfg *config.Config) (*hl7v2.CodeMap, error) {
	entries := hl7v2.DefaultCodeEntries()
	for _, a := range cfg.Analytes {
		entries = append(entries, hl7v2.CodeEntry{System: a.System, Code: a.Code, Analyte: a.Analyte, Unit: a.Unit})
	}
	m, err := hl7v2.NewCodeMap(entries...)
	if err != nil {
		return nil, fmt.Errorf("analytes: %w", err)
	}
	return m, nil
}

// Withdrawing eGFRs.
//
// An eGFR sent earlier must not stay on the chart once the result it was
// calculated from is withdrawn, cancelled or corrected into a value that
// gives no eGFR (DESIGN.md, clinical safety rules: corrected results
// produce a corrected eGFR; cancelled results cancel it). Which eGFRs are
// withdrawn, and with which status, is decided here for both transports;
// hl7v2 and fhir only write the decision.
//
// For each creatinine, cystatin C or urine creatinine input of a group:
//
//   - Deleted or wrong (HL7 v2.5.1 table 0085: D deletes the OBX record,
//     W post original as wrong; FHIR R4 ObservationStatus
//     entered-in-error): each eGFR that can derive from it is withdrawn
//     with the same status.
//   - Cancelled (table 0085 X, results cannot be obtained for this
//     observation; FHIR cancelled, the observation is unavailable): each
//     such eGFR is withdrawn with status X, or cancelled.
//   - Corrected (table 0085 C, record coming over is a correction and thus
//     replaces a final result; FHIR corrected or amended): each such eGFR
//     for which the outcome now has no result is withdrawn with status D
//     (deletes the OBX record), or entered-in-error, since the earlier
//     value must not stand; the refusal saying why is written as usual.
//
// The eGFRs that can derive from an input are those of the policy band at
// the patient's age as calc computed it (every band when the age is
// unknown) whose equation uses the input's analyte, height and weight
// included (Equation.Inputs), and whose other measured inputs (creatinine,
// cystatin C) are in this message or, for a message that corrects or
// deletes one input alone, in the patient's result history for the same
// specimen time: so a cystatin C corrected alone withdraws the combined
// eGFR made with it earlier, while a creatinine-only report withdraws no
// combined eGFR that was never made. Under the policy "both", a
// sex-dependent equation is withdrawn in all three forms (as one value, as
// if female, as if male), since the patient's sex may have become known or
// unknown since. An eGFR the outcome reports again is never withdrawn: the
// new value replaces it.
//
// These rules apply only when there is no record of what was sent for the
// order or specimen (sentBefore, which is exact, applies otherwise): for a
// first message about it, or one that was sent before the record existed.
// They may then name an eGFR that was never sent (receivers must accept a
// withdrawal of an observation they do not hold). When two inputs withdraw the
// same eGFR (creatinine and cystatin C both deleted), it is withdrawn once:
// for the input's own withdrawal or cancellation rather than for a
// correction, and otherwise for the later input.

// inputState is what an input's status means for eGFRs derived from it.
type inputState int

const (
	inputOther     inputState = iota
	inputWithdrawn            // HL7 D or W; FHIR entered-in-error
	inputCancelled            // HL7 X; FHIR cancelled
	inputCorrected            // HL7 C; FHIR corrected or amended
)

// groupInput is an input of a group an eGFR may be calculated from
// (inputAnalyte), in any status.
type groupInput struct {
	SourceID string
	Analyte  calc.Analyte
	// Identity is the input's stable identity across messages (FHIR
	// Observation identity); "" for HL7 v2.
	Identity string
	State    inputState
	// Status is the transport's status code for the withdrawals this
	// input causes (unused for inputOther).
	Status string
}

// withdrawal is one eGFR to withdraw, in neutral form.
type withdrawal struct {
	SourceID, Equation, EquationName, LOINC, LOINCName, Unit, AssumedSex, Status string
	// ID is the receiver's id of the withdrawn observation when known
	// (FHIR, from the record of what was sent).
	ID string
}

// sentBefore plans the withdrawals of one group from the record of what was
// sent for its order or specimen (store.Reported): every observation still
// active that this message does not report again, that was computed from
// this same specimen (FHIR: one of its input Observations is in the
// message), and whose equation uses an input this message carries, is
// withdrawn, with the input's own D, W or X (withdrawn, cancelled), else
// with corrective (HL7 D, FHIR entered-in-error). A final or preliminary
// input that is not a correction withdraws only when it now gives a value
// that cannot be used, or when the equation no longer applies (a corrected
// birth date changed the age band, the sex became known): not when the
// message merely lacks something (height, birth date, sex), which would
// withdraw a valid eGFR. This covers a preliminary eGFR whose input
// arrives final but uncomputable, and never names an observation that was
// not sent.
func sentBefore(reg *calc.Registry, pol calc.Policy, out calc.Outcome, inputs []groupInput, prev []store.Reported, corrective string) []withdrawal {
	type key struct{ equation, sex string }
	computed := map[key]bool{}
	for _, r := range out.Results {
		computed[key{r.Equation, r.AssumedSex}] = true
	}
	idents := map[string]bool{}
	for _, in := range inputs {
		if in.Identity != "" {
			idents[in.Identity] = true
		}
	}
	var ws []withdrawal
	for _, p := range prev {
		if !p.Active || computed[key{p.Equation, p.AssumedSex}] || !sameSpecimen(p.Inputs, idents) {
			continue
		}
		e, ok := reg.Latest(p.Equation)
		if !ok {
			continue
		}
		var cause *groupInput
		for i := range inputs {
			in := &inputs[i]
			if !slices.Contains(e.Inputs(), in.Analyte) {
				continue
			}
			if in.State == inputOther && !unusableNow(out, e.ID, in) {
				continue
			}
			if cause == nil || (cause.State != inputWithdrawn && cause.State != inputCancelled &&
				(in.State == inputWithdrawn || in.State == inputCancelled)) {
				cause = in
			}
		}
		if cause == nil {
			continue
		}
		status := corrective
		if cause.State == inputWithdrawn || cause.State == inputCancelled {
			status = cause.Status
		}
		code, name := loincOf(pol, e)
		ws = append(ws, withdrawal{SourceID: cause.SourceID, Equation: e.ID, EquationName: e.Name,
			LOINC: code, LOINCName: name, Unit: e.Unit, AssumedSex: p.AssumedSex, Status: status, ID: p.ExternalID})
	}
	return ws
}

// sameSpecimen reports whether a recorded observation was computed from
// one of the message's inputs; an empty record of inputs (HL7 v2, where
// the order key ties them) always matches.
func sameSpecimen(recorded string, idents map[string]bool) bool {
	if recorded == "" {
		return true
	}
	for _, id := range strings.Split(recorded, ",") {
		if idents[id] {
			return true
		}
	}
	return false
}

// missingData are the refusals that say a message lacks something rather
// than that a value is wrong.
var missingData = map[calc.Reason]bool{
	calc.ReasonHeightMissing: true, calc.ReasonAgeMissing: true, calc.ReasonSexUnknown: true, calc.ReasonInputMissing: true,
}

// unusableNow reports whether a final or preliminary input now withdraws
// an equation's earlier value: its own value is refused, or the equation
// was refused (or not attempted) for a reason other than missing data.
func unusableNow(out calc.Outcome, equation string, in *groupInput) bool {
	for _, rf := range out.Refusals {
		if rf.SourceID == in.SourceID && rf.Equation == "" && !missingData[rf.Code] {
			return true // the input's value itself is unusable
		}
	}
	for _, rf := range out.Refusals {
		if (rf.Equation == equation || rf.Equation == "") && missingData[rf.Code] {
			return false // only something is missing: the earlier value stands
		}
	}
	return true // refused for another reason, or no longer applicable
}

// ReportedSource reads the record of what was sent (store.Store satisfies
// it).
type ReportedSource interface {
	ReportedIn(ctx context.Context, groupKey string) ([]store.Reported, error)
}

// previouslySent reads the record for a group. An error means the record
// could not be read: the message must be answered AE (or 503) so that it
// is resent, rather than processed without it.
func previouslySent(ctx context.Context, src ReportedSource, groupKey string) ([]store.Reported, error) {
	if src == nil || groupKey == "" {
		return nil, nil
	}
	prev, err := src.ReportedIn(ctx, pipeline.StorageKey(groupKey))
	if err != nil {
		return nil, fmt.Errorf("ingest: read the record of what was sent: %w", err)
	}
	return prev, nil
}

// mergeWithdrawals keeps the withdrawals from the record and adds those
// of the rules for observations the record does not know at all (an eGFR
// sent before the record existed, or under another key), for inputs that
// are withdrawn, cancelled or corrected: a withdrawal too many is safer
// than a wrong eGFR left standing. What the record knows, it decides.
func mergeWithdrawals(fromRecord, fromRules []withdrawal, prev []store.Reported, inputs []groupInput) []withdrawal {
	type key struct{ equation, sex string }
	idents := map[string]bool{}
	for _, in := range inputs {
		if in.Identity != "" {
			idents[in.Identity] = true
		}
	}
	seen := map[key]bool{}
	for _, p := range prev {
		if sameSpecimen(p.Inputs, idents) {
			seen[key{p.Equation, p.AssumedSex}] = true
		}
	}
	for _, w := range fromRecord {
		seen[key{w.Equation, w.AssumedSex}] = true
	}
	out := fromRecord
	for _, w := range fromRules {
		if !seen[key{w.Equation, w.AssumedSex}] {
			out = append(out, w)
		}
	}
	return out
}

// inputAnalyte reports the analytes an eGFR may be calculated from,
// height and weight included.
func inputAnalyte(a calc.Analyte) bool {
	switch a {
	case calc.Creatinine, calc.CystatinC, calc.UrineCreatinine, calc.Height, calc.Weight, calc.UrineVolume, calc.CollectionTime:
		return true
	}
	return false
}

func (st *State) registry() *calc.Registry {
	if st.Equations != nil {
		return st.Equations
	}
	return calc.Builtin()
}

// planWithdrawals applies the withdrawal rules to one evaluated group: req
// is the request as evaluated (policy and sex), out its outcome, inputs
// the group's inputs in message order.
//
// present reports whether a measured input (creatinine, cystatin C, urine
// creatinine) of this specimen is known, in the message or the history.
func planWithdrawals(reg *calc.Registry, req calc.Request, out calc.Outcome, inputs []groupInput, present func(calc.Analyte) bool) []withdrawal {
	pol := req.Policy
	bands := pol.Bands
	if out.AgeYears != nil {
		bands = nil
		if b, ok := pol.BandFor(*out.AgeYears); ok {
			bands = []calc.Band{b}
		}
	}
	var eqs []calc.Equation
	seen := map[string]bool{}
	for _, b := range bands {
		for _, id := range bandEquations(b) {
			if seen[id] {
				continue
			}
			seen[id] = true
			if e, ok := reg.Latest(id); ok {
				eqs = append(eqs, e)
			}
		}
	}
	type key struct{ equation, sex string }
	computed := map[key]bool{}
	for _, r := range out.Results {
		computed[key{r.Equation, r.AssumedSex}] = true
	}
	plan := map[key]withdrawal{}
	corrective := map[key]bool{} // planned for a correction only
	var order []key
	for _, in := range inputs {
		if in.State == inputOther {
			continue
		}
		for _, e := range eqs {
			if !slices.Contains(e.Inputs(), in.Analyte) || !allPresent(e.Uses(), present) {
				continue
			}
			sexes := []string{""}
			if e.Needs.Has(calc.NeedSex) && pol.SexUnknown == calc.SexRuleBoth {
				sexes = []string{"", calc.SexFemale.String(), calc.SexMale.String()}
			}
			for _, sex := range sexes {
				k := key{e.ID, sex}
				if computed[k] {
					continue
				}
				_, planned := plan[k]
				if planned && in.State == inputCorrected && !corrective[k] {
					continue // the input's own withdrawal takes precedence
				}
				if !planned {
					order = append(order, k)
				}
				code, name := loincOf(pol, e)
				plan[k] = withdrawal{SourceID: in.SourceID, Equation: e.ID, EquationName: e.Name,
					LOINC: code, LOINCName: name, Unit: e.Unit, AssumedSex: sex, Status: in.Status}
				corrective[k] = in.State == inputCorrected
			}
		}
	}
	ws := make([]withdrawal, 0, len(order))
	for _, k := range order {
		ws = append(ws, plan[k])
	}
	return ws
}

func allPresent(uses []calc.Analyte, present func(calc.Analyte) bool) bool {
	for _, a := range uses {
		if !present(a) {
			return false
		}
	}
	return true
}

// HistorySource reads the result history (store.Store satisfies it).
type HistorySource interface {
	History(ctx context.Context, patientID, analyte string, since time.Time) ([]store.HistoryPoint, error)
}

// presence returns the "present" function of planWithdrawals for one group:
// an analyte is present when the group has an input of it (in any status),
// or when the patient's history holds a value of it for the same
// collection time. A history lookup that fails counts as present: a
// withdrawal too many is safer than a stale eGFR.
func presence(ctx context.Context, hist HistorySource, patientID string, at time.Time, inputs []groupInput) func(calc.Analyte) bool {
	return func(a calc.Analyte) bool {
		for _, in := range inputs {
			if in.Analyte == a {
				return true
			}
		}
		if hist == nil || patientID == "" || at.IsZero() || (a != calc.Creatinine && a != calc.CystatinC) {
			return false
		}
		pts, err := hist.History(ctx, patientID, string(a), at.Add(-time.Second))
		if err != nil {
			return true
		}
		for _, p := range pts {
			if p.CollectedAt.Equal(at) {
				return true
			}
		}
		return false
	}
}

// hl7Withdrawals returns, per order of the message, the eGFR observations
// to withdraw (hl7v2.EnrichOptions.Withdrawals). index maps each
// evaluated group to its order, as neutral returns it.
func hl7Withdrawals(ctx context.Context, hist HistorySource, sent ReportedSource, st *State, oru *hl7v2.ORU, pm pipeline.Message, evals []pipeline.Evaluated, index []int) ([][]hl7v2.Withdrawal, error) {
	reg := st.registry()
	keys := HL7GroupKeys(oru)
	out := make([][]hl7v2.Withdrawal, len(oru.Orders))
	for i, e := range evals {
		var inputs []groupInput
		for _, obs := range oru.Orders[index[i]].Observations {
			if !inputAnalyte(obs.Analyte) {
				continue
			}
			in := groupInput{SourceID: obs.SourceID, Analyte: obs.Analyte}
			switch hl7v2.ClassifyStatus(obs.Status) {
			case hl7v2.StatusRetract:
				in.State, in.Status = inputWithdrawn, obs.Status
			case hl7v2.StatusCancel:
				in.State, in.Status = inputCancelled, "X"
			case hl7v2.StatusCompute:
				if obs.Status == "C" {
					in.State, in.Status = inputCorrected, "D"
				}
			}
			inputs = append(inputs, in)
		}
		pid := e.Group.PatientID
		if pid == "" {
			pid = pm.PatientID
		}
		prev, err := previouslySent(ctx, sent, keys[index[i]])
		if err != nil {
			return nil, err
		}
		present := presence(ctx, hist, pid, e.Request.CollectedAt, inputs)
		ws := mergeWithdrawals(sentBefore(reg, e.Request.Policy, e.Outcome, inputs, prev, "D"),
			planWithdrawals(reg, e.Request, e.Outcome, inputs, present), prev, inputs)
		for _, w := range ws {
			out[index[i]] = append(out[index[i]], hl7v2.Withdrawal{SourceID: w.SourceID, Equation: w.Equation,
				EquationName: w.EquationName, LOINC: w.LOINC, LOINCName: w.LOINCName, Unit: w.Unit,
				AssumedSex: w.AssumedSex, Status: w.Status})
		}
	}
	return out, nil
}

// fhirWithdrawals returns the eGFR Observations to withdraw for one group
// (fhir.GroupResult.Withdrawals).
func fhirWithdrawals(ctx context.Context, hist HistorySource, sent ReportedSource, st *State, x *fhir.Extraction, g *fhir.Group, e pipeline.Evaluated) ([]fhir.Withdrawal, error) {
	mine := map[*fhir.Observation]bool{}
	for _, o := range append(append([]*fhir.Observation(nil), g.Inputs...), g.Withdrawn...) {
		mine[o] = true
	}
	var inputs []groupInput
	for _, o := range x.Inputs { // request order
		if !mine[o] || !inputAnalyte(o.Analyte) {
			continue
		}
		in := groupInput{SourceID: o.SourceID, Analyte: o.Analyte, Identity: o.Identity()}
		switch o.Status {
		case "entered-in-error":
			in.State, in.Status = inputWithdrawn, "entered-in-error"
		case "cancelled":
			in.State, in.Status = inputCancelled, "cancelled"
		case "corrected", "amended":
			in.State, in.Status = inputCorrected, "entered-in-error"
		}
		inputs = append(inputs, in)
	}
	var out []fhir.Withdrawal
	prev, err := previouslySent(ctx, sent, FHIRGroupKey(e.Group))
	if err != nil {
		return nil, err
	}
	present := presence(ctx, hist, e.Group.PatientID, e.Request.CollectedAt, inputs)
	ws := mergeWithdrawals(sentBefore(st.registry(), e.Request.Policy, e.Outcome, inputs, prev, "entered-in-error"),
		planWithdrawals(st.registry(), e.Request, e.Outcome, inputs, present), prev, inputs)
	for _, w := range ws {
		out = append(out, fhir.Withdrawal{SourceID: w.SourceID, Equation: w.Equation,
			EquationName: w.EquationName, LOINC: w.LOINC, LOINCName: w.LOINCName, Unit: w.Unit,
			AssumedSex: w.AssumedSex, Status: w.Status, ID: w.ID})
	}
	return out, nil
}

// withdrawalCause explains a withdrawal status for the audit trail.
func withdrawalCause(status string) string {
	switch status {
	case "X", "cancelled":
		return "the result it was calculated from could not be obtained (cancelled)"
	case "W":
		return "the result it was calculated from was posted as wrong"
	case "D":
		return "the result it was calculated from was deleted, or corrected to a value that gives no eGFR"
	case "entered-in-error":
		return "the result it was calculated from was entered in error, or corrected to a value that gives no eGFR"
	default:
		return "the result it was calculated from was withdrawn"
	}
}

// HL7GroupKey names an order for the record of what was sent: the sending
// facility (MSH-4), the patient (PID-3), the filler order number (OBR-3,
// all components, so that its namespace counts), else the placer order
// number (OBR-2), else the collection time as sent, and the universal
// service identifier (OBR-4.1), so that two OBR segments sharing a filler
// number keep apart.
func HL7GroupKey(oru *hl7v2.ORU, order int) string {
	msh := oru.Message().MSH()
	ord := oru.Orders[order]
	pid := ""
	if ord.Patient != nil {
		pid = ord.Patient.ID + "^^^" + ord.Patient.AssigningAuthority
	}
	obr := ord.Segment()
	var id string
	switch {
	case obr != nil && obr.Field(3).Raw() != "":
		id = "filler:" + obr.Field(3).Raw()
	case obr != nil && obr.Field(2).Raw() != "":
		id = "placer:" + obr.Field(2).Raw()
	case pid != "" && ord.CollectedText != "":
		id = "collected:" + ord.CollectedText
	default:
		return ""
	}
	service := ""
	if obr != nil {
		service = obr.Field(4).Component(1).String()
	}
	return "hl7v2|" + msh.Field(4).String() + "|" + pid + "|" + id + "|" + service
}

// HL7GroupKeys returns HL7GroupKey for every order of a message; orders
// of one message that would share a key (two OBR segments with the same
// filler number and service) are told apart by their occurrence.
func HL7GroupKeys(oru *hl7v2.ORU) []string {
	keys := make([]string, len(oru.Orders))
	count := map[string]int{}
	for i := range oru.Orders {
		k := HL7GroupKey(oru, i)
		if k != "" {
			if n := count[k]; n > 0 {
				keys[i] = fmt.Sprintf("%s#%d", k, n+1)
			} else {
				keys[i] = k
			}
			count[k]++
		}
	}
	return keys
}

// HL7ObservationKey names one eGFR observation of an order: the receiver
// keys it on the order, OBX-3 and OBX-4 (the equation and assumed sex).
func HL7ObservationKey(groupKey, equation, assumedSex string) string {
	return groupKey + "|" + equation + "|" + assumedSex
}

// FHIRGroupKey names a FHIR specimen group for the record of what was
// sent: the patient and the collection time.
func FHIRGroupKey(g pipeline.Group) string {
	if g.PatientID == "" || g.Request.CollectedAt.IsZero() {
		return ""
	}
	return "fhir|" + g.PatientID + "|" + g.Request.CollectedAt.UTC().Format(time.RFC3339Nano)
}
