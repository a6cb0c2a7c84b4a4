package fhir

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"time"

	cpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/codes_go_proto"
	dpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/datatypes_go_proto"
	bcrpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/bundle_and_contained_resource_go_proto"
	opb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/observation_go_proto"
	oopb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/operation_outcome_go_proto"
	provpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/provenance_go_proto"
	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/types/known/anypb"

	"filtrate/calc"
	"filtrate/hl7v2"
)

// Meta is what the outputs state about how they were produced.
type Meta struct {
	// Now is the time written to Observation.issued, Provenance.recorded
	// and Bundle.timestamp.
	Now time.Time
	// SoftwareVersion and ConfigHash are filtrate's version and the hash
	// of the configuration in force.
	SoftwareVersion string
	ConfigHash      string
	// Duplicate tells that the request had been received before: nothing
	// new was recorded.
	Duplicate bool
}

// GroupResult is the calculation outcome of one Group (aligned with
// Extraction.Groups).
type GroupResult struct {
	Outcome calc.Outcome
	// RecordIDs are the audit record IDs of Outcome.Results, in order;
	// nil when not known (before commit).
	RecordIDs []int64
	// Withdrawals are the eGFR Observations of the group to withdraw. The
	// caller (internal/ingest) decides them; the builder writes them.
	Withdrawals []Withdrawal
}

// Withdrawal is one eGFR Observation sent earlier that the receiver must
// withdraw. It is written with the id the result was written to: the id
// derives from the group's patient identifier and collection time, the
// equation, the assumed sex and the identities of the measured inputs the
// equation uses, exactly as for a result (see the package documentation,
// Identity, for the one case where it cannot be).
type Withdrawal struct {
	// SourceID names the input Observation (Observation.SourceID) whose
	// status, or whose correction, withdraws the eGFR; it becomes
	// derivedFrom.
	SourceID string
	// Equation, EquationName, LOINC, LOINCName, Unit and AssumedSex are
	// those of the result withdrawn (calc.Result).
	Equation     string
	EquationName string
	LOINC        string
	LOINCName    string
	Unit         string
	AssumedSex   string
	// Status is Observation.status (FHIR R4 ObservationStatus):
	// entered-in-error (the value should not have been sent) or cancelled
	// (the observation is unavailable).
	Status string
	// ID, when set, is the id the withdrawn result was written to (as kept
	// by the caller); otherwise it is derived like a result's.
	ID string
}

// output is one computed resource.
type output struct {
	typ, id, fullURL string
	res              *bcrpb.ContainedResource
}

// built is everything the outputs of a request hold.
type built struct {
	resources []output
	issues    []Issue
	// notes are annotations added to the forwarded copy of an input
	// Observation, saying why no eGFR was added.
	notes map[*entry][]string
}

// resultID returns the id of the eGFR Observation of a patient (its
// Patient.identifier, system|value), collection time (UTC), equation,
// assumed sex and input identities (Observation.identity of the measured
// inputs the equation uses, in any order): the first 128 bits of a
// SHA-256, in hex. Results and withdrawals both take their id from here,
// with the same inputs, so a withdrawal addresses exactly the Observation
// its result was written to. The identities tell apart two specimens of
// one patient with the same collection time (a date without a time, say);
// without any, the id derives from the first four alone.
func resultID(g *Group, equation, assumedSex string, identities []string) string {
	at := ""
	if !g.CollectedAt.IsZero() {
		at = g.CollectedAt.UTC().Format(time.RFC3339Nano)
	}
	parts := []string{g.Patient.ID, at, equation, assumedSex}
	if len(identities) > 0 {
		ids := slices.Clone(identities)
		slices.Sort(ids)
		parts = append(parts, "inputs")
		for _, id := range ids {
			parts = append(parts, strconv.Quote(id)) // quoted: no NUL inside a part
		}
	}
	h := sha256.Sum256([]byte(strings.Join(parts, "\x00")))
	return hex.EncodeToString(h[:16])
}

// identities returns the non-empty identities of inputs whose analyte is
// one of uses: the measured inputs (creatinine, cystatin C, urine
// creatinine) that key an eGFR's id. Height and weight are left out: an
// eGFR recalculated with another height or weight Observation is the same
// eGFR of the same specimen, and must replace the one sent before.
func identities(inputs []*Observation, uses []calc.Analyte) []string {
	var ids []string
	for _, o := range inputs {
		if o.identity != "" && slices.Contains(uses, o.Analyte) {
			ids = append(ids, o.identity)
		}
	}
	return ids
}

// build makes the computed resources and issues. withRecords adds the
// audit record IDs to the Provenances.
func (x *Extraction) build(res []GroupResult, meta Meta, withRecords bool) (*built, error) {
	if len(res) != len(x.Groups) {
		return nil, fmt.Errorf("fhir: %d outcomes for %d groups", len(res), len(x.Groups))
	}
	b := &built{notes: map[*entry][]string{}}
	seen := map[string]bool{}
	addIssue := func(is Issue, anchor *Observation) {
		key := is.Code + "\x00" + is.Details + "\x00" + strings.Join(is.Expression, ",")
		if seen[key] {
			return
		}
		seen[key] = true
		b.issues = append(b.issues, is)
		if anchor != nil {
			b.notes[anchor.entry] = append(b.notes[anchor.entry], is.Details)
		}
	}
	for _, n := range x.Notes {
		var anchor *Observation
		for _, o := range x.Inputs {
			if len(n.Expression) > 0 && o.Expression == n.Expression[0] {
				anchor = o
			}
		}
		addIssue(n, anchor)
	}
	for gi, g := range x.Groups {
		out := res[gi].Outcome
		for ri, r := range out.Results {
			var recID int64
			if withRecords && ri < len(res[gi].RecordIDs) {
				recID = res[gi].RecordIDs[ri]
			}
			o, p, err := x.result(g, &out, r, meta, recID)
			if err != nil {
				return nil, err
			}
			b.resources = append(b.resources, o, p)
		}
		for _, w := range res[gi].Withdrawals {
			o, err := x.withdrawal(g, w, meta)
			if err != nil {
				return nil, err
			}
			b.resources = append(b.resources, o)
		}
		for _, rf := range out.Refusals {
			anchor := g.refusalAnchor(rf)
			is := Issue{Severity: "warning", Code: "business-rule", Reason: string(rf.Code), Details: rf.Message, Diagnostics: rf.Message}
			if is.Details == "" {
				is.Details = rf.Code.Describe()
				is.Diagnostics = is.Details
			}
			if anchor != nil {
				is.Expression = []string{anchor.Expression}
			}
			addIssue(is, anchor)
		}
	}
	if meta.Duplicate {
		addIssue(Issue{Severity: "information", Code: "informational",
			Details:     "this request was received before; nothing new was recorded",
			Diagnostics: "This request was received before; nothing new was recorded. The results are those of the first copy."}, nil)
	}
	if len(b.issues) == 0 && len(x.Groups) == 0 {
		text := "No creatinine or cystatin C result was recognised: nothing was calculated."
		b.issues = append(b.issues, Issue{Severity: "information", Code: "informational", Details: text, Diagnostics: text})
	}
	if len(b.issues) == 0 {
		n := 0
		for _, r := range res {
			n += len(r.Outcome.Results)
		}
		text := fmt.Sprintf("Accepted and recorded: %d calculated result(s).", n)
		b.issues = append(b.issues, Issue{Severity: "information", Code: "informational", Details: text, Diagnostics: text})
	}
	return b, nil
}

func (g *Group) bySource(id string) *Observation {
	if id == "" {
		return nil
	}
	for _, o := range append(append([]*Observation(nil), g.Inputs...), g.Borrowed...) {
		if o.SourceID == id {
			return o
		}
	}
	return nil
}

// refusalAnchor finds the input a refusal is about: by source, else the
// first usable input of its analyte, else the group's first creatinine or
// cystatin C input.
func (g *Group) refusalAnchor(rf calc.Refusal) *Observation {
	if o := g.bySource(rf.SourceID); o != nil {
		return o
	}
	if rf.Analyte != "" {
		for _, o := range g.Inputs {
			if o.Analyte == rf.Analyte && o.Action == hl7v2.StatusCompute {
				return o
			}
		}
	}
	for _, o := range g.Inputs {
		if primary(o.Analyte) && o.Action == hl7v2.StatusCompute {
			return o
		}
	}
	for _, o := range g.Inputs {
		if primary(o.Analyte) {
			return o
		}
	}
	if len(g.Withdrawn) > 0 {
		return g.Withdrawn[0]
	}
	return nil
}

// used finds the inputs a result was computed from, for each analyte of
// calc.Result.Inputs (height and weight included) or, when that is empty,
// of calc.Result.Uses: the input calc reports for it, else the first
// usable input of that analyte.
func (g *Group) used(out *calc.Outcome, r calc.Result) []*Observation {
	analytes := r.Inputs
	if len(analytes) == 0 {
		analytes = r.Uses
	}
	var used []*Observation
	for _, a := range analytes {
		var found *Observation
		for _, in := range out.Inputs {
			if in.Analyte == a {
				if o := g.bySource(in.SourceID); o != nil {
					found = o
					break
				}
			}
		}
		if found == nil {
			for _, o := range g.Inputs {
				if o.Analyte == a && o.Action == hl7v2.StatusCompute {
					found = o
					break
				}
			}
		}
		if found != nil {
			used = append(used, found)
		}
	}
	return used
}

// combinedStatus is the status of a value derived from inputs: the least
// final of theirs (preliminary, then corrected, then amended, then final).
func combinedStatus(used []*Observation) cpb.ObservationStatusCode_Value {
	rank := map[string]int{"final": 1, "amended": 2, "corrected": 3, "preliminary": 4}
	best := "final"
	for _, o := range used {
		if rank[o.Status] > rank[best] {
			best = o.Status
		}
	}
	return cpb.ObservationStatusCode_Value(cpb.ObservationStatusCode_Value_value[strings.ToUpper(best)])
}

// subject sets the subject of an output Observation, containing a copy of
// the Patient when the input contained it.
func (g *Group) subject(o *opb.Observation) {
	if g.Patient.contained != nil {
		o.Contained = []*anypb.Any{clone(g.Patient.contained)}
	}
	o.Subject = reference(g.Patient.subject)
}

func resultText(r calc.Result) string {
	text := r.EquationName
	if r.Unit == calc.UnitIndexed {
		text = "eGFR (" + r.EquationName + ")"
	}
	if r.AssumedSex != "" {
		text += ", calculated as if " + r.AssumedSex
	}
	return text
}

// ResultInputs returns the identities of the input Observations a result
// was computed from (those that key its id).
func (x *Extraction) ResultInputs(g *Group, out *calc.Outcome, r calc.Result) []string {
	return identities(g.used(out, r), r.Uses)
}

// Identity is the Observation's stable identity (identifier, else id, else
// fullUrl), as used in result ids.
func (o *Observation) Identity() string { return o.identity }

// ResultID returns the id of the eGFR Observation written for a result of
// a group (as Response and Forward write it), so that the caller can keep
// track of what was sent.
func (x *Extraction) ResultID(g *Group, out *calc.Outcome, r calc.Result) string {
	return "egfr-" + resultID(g, r.Equation, r.AssumedSex, identities(g.used(out, r), r.Uses))
}

func (x *Extraction) result(g *Group, out *calc.Outcome, r calc.Result, meta Meta, recordID int64) (output, output, error) {
	used := g.used(out, r)
	h := resultID(g, r.Equation, r.AssumedSex, identities(used, r.Uses))
	obsID, provID := "egfr-"+h, "prov-"+h
	obsURL, provURL := "urn:uuid:"+uuidFrom("Observation/"+obsID), "urn:uuid:"+uuidFrom("Provenance/"+provID)

	o := &opb.Observation{
		Id:       &dpb.Id{Value: obsID},
		Status:   &opb.Observation_StatusCode{Value: combinedStatus(used)},
		Category: []*dpb.CodeableConcept{concept("", coding(SystemObsCategory, "laboratory", "Laboratory"))},
		Issued:   instant(meta.Now),
		Method: concept(r.EquationName+", implementation version "+r.EquationVersion,
			&dpb.Coding{System: uri(SystemEquation), Version: str(r.EquationVersion), Code: code(r.Equation), Display: str(r.EquationName)}),
	}
	if r.LOINC != "" {
		o.Code = concept(resultText(r), coding(SystemLOINC, r.LOINC, r.LOINCName))
	} else {
		o.Code = concept(resultText(r))
	}
	g.subject(o)
	if g.effective != nil {
		o.Effective = &opb.Observation_EffectiveX{Choice: &opb.Observation_EffectiveX_DateTime{DateTime: clone(g.effective)}}
	}
	unit := r.Unit
	if unit == "" {
		unit = calc.UnitIndexed
	}
	cmp, num := splitComparator(r.Reported)
	if r.Capped && cmp == "" {
		cmp = ">"
	}
	if isDecimal(num) {
		q := &dpb.Quantity{Value: &dpb.Decimal{Value: num}, Unit: str(unit), System: uri(SystemUCUM), Code: code(unit)}
		if c, ok := comparatorCode(cmp); ok {
			q.Comparator = &dpb.Quantity_ComparatorCode{Value: c}
		}
		o.Value = &opb.Observation_ValueX{Choice: &opb.Observation_ValueX_Quantity{Quantity: q}}
	} else {
		o.Value = &opb.Observation_ValueX{Choice: &opb.Observation_ValueX_StringValue{StringValue: str(r.Reported)}}
	}
	var notes []string
	if r.Category != "" {
		notes = append(notes, "KDIGO GFR category: "+r.Category)
	}
	notes = append(notes, r.Comments...)
	for _, n := range notes {
		o.Note = append(o.Note, &dpb.Annotation{Text: markdown(n)})
	}
	p := &provpb.Provenance{
		Id:       &dpb.Id{Value: provID},
		Target:   []*dpb.Reference{reference(obsURL)},
		Recorded: instant(meta.Now),
		Agent: []*provpb.Provenance_Agent{{
			Type: concept("", coding(SystemProvAgent, "assembler", "Assembler")),
			Who:  &dpb.Reference{Display: str("filtrate " + meta.SoftwareVersion)},
		}},
		Extension: []*dpb.Extension{
			extCoding(ExtEquation, &dpb.Coding{System: uri(SystemEquation), Version: str(r.EquationVersion), Code: code(r.Equation), Display: str(r.EquationName)}),
			extCoding(ExtPolicy, &dpb.Coding{System: uri(SystemPolicy), Version: str(out.PolicyVersion), Code: code(out.Policy)}),
			extString(ExtConfigHash, meta.ConfigHash),
			extString(ExtSoftware, meta.SoftwareVersion),
			extString(ExtMessageID, x.Request.MessageID()),
		},
	}
	if recordID > 0 {
		p.Extension = append(p.Extension, extIdentifier(ExtAuditRecord, SystemAuditRecord, strconv.FormatInt(recordID, 10)))
	}
	for _, u := range used {
		o.DerivedFrom = append(o.DerivedFrom, reference(u.entry.ref))
		p.Entity = append(p.Entity, &provpb.Provenance_Entity{
			Role: &provpb.Provenance_Entity_RoleCode{Value: cpb.ProvenanceEntityRoleCode_SOURCE},
			What: reference(u.entry.ref),
		})
	}
	return output{typ: "Observation", id: obsID, fullURL: obsURL, res: &bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_Observation{Observation: o}}},
		output{typ: "Provenance", id: provID, fullURL: provURL, res: &bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_Provenance{Provenance: p}}},
		nil
}

// Notes of withdrawn eGFRs. They contain no patient data.
const (
	noteEnteredInError = "eGFR withdrawn: the result it was calculated from was entered in error."
	noteCancelled      = "eGFR cancelled: the result it was calculated from was cancelled."
	noteNoLonger       = "eGFR withdrawn: the corrected result it was calculated from no longer gives this eGFR."
)

// withdrawal is the eGFR Observation that withdraws one sent earlier: the
// same id, code and method, the withdrawal's status, no value, and a note
// saying why (for entered-in-error, whether the input itself was entered
// in error or was corrected).
func (x *Extraction) withdrawal(g *Group, w Withdrawal, meta Meta) (output, error) {
	var status cpb.ObservationStatusCode_Value
	text := noteEnteredInError
	switch w.Status {
	case "entered-in-error":
		status = cpb.ObservationStatusCode_ENTERED_IN_ERROR
	case "cancelled":
		status, text = cpb.ObservationStatusCode_CANCELLED, noteCancelled
	default:
		return output{}, fmt.Errorf("fhir: withdrawal of equation %q: status %q is not entered-in-error or cancelled", w.Equation, w.Status)
	}
	if w.Equation == "" {
		return output{}, fmt.Errorf("fhir: withdrawal without an equation")
	}
	var input *Observation
	for _, o := range g.all() {
		if o.SourceID == w.SourceID {
			input = o
			break
		}
	}
	if status == cpb.ObservationStatusCode_ENTERED_IN_ERROR && input != nil && input.Action == hl7v2.StatusCompute {
		text = noteNoLonger
	}
	tpl := calc.Result{Equation: w.Equation, EquationName: w.EquationName, LOINC: w.LOINC, LOINCName: w.LOINCName, Unit: w.Unit, AssumedSex: w.AssumedSex}
	if tpl.Unit == "" {
		tpl.Unit = calc.UnitIndexed
	}
	id := w.ID
	if id == "" {
		id = "egfr-" + resultID(g, w.Equation, w.AssumedSex, x.withdrawnIdentities(g, w, input))
	}
	o := &opb.Observation{
		Id:       &dpb.Id{Value: id},
		Status:   &opb.Observation_StatusCode{Value: status},
		Category: []*dpb.CodeableConcept{concept("", coding(SystemObsCategory, "laboratory", "Laboratory"))},
		Issued:   instant(meta.Now),
		Method:   concept(w.EquationName, coding(SystemEquation, w.Equation, w.EquationName)),
		Note:     []*dpb.Annotation{{Text: markdown(text)}},
	}
	if input != nil {
		o.DerivedFrom = []*dpb.Reference{reference(input.entry.ref)}
	}
	if w.LOINC != "" {
		o.Code = concept(resultText(tpl), coding(SystemLOINC, w.LOINC, w.LOINCName))
	} else {
		o.Code = concept(resultText(tpl))
	}
	g.subject(o)
	if g.effective != nil {
		o.Effective = &opb.Observation_EffectiveX{Choice: &opb.Observation_EffectiveX_DateTime{DateTime: clone(g.effective)}}
	}
	return output{typ: "Observation", id: id, fullURL: "urn:uuid:" + uuidFrom("Observation/"+id),
		res: &bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_Observation{Observation: o}}}, nil
}

// all returns the group's inputs: its own, the withdrawn and the borrowed.
func (g *Group) all() []*Observation {
	return slices.Concat(g.Inputs, g.Withdrawn, g.Borrowed)
}

// withdrawnIdentities returns the input identities of the eGFR a
// withdrawal withdraws, as its result had them (see resultID): for each
// measured analyte the equation uses, the withdrawing input itself when it
// is of that analyte, else the group's input of it (usable first, then
// withdrawn, then any other; in request order). When the request holds no
// input of an analyte the equation uses (a combined eGFR withdrawn for a
// cystatin C sent alone, say), the identities are unknown and it returns
// nil, so that the id derives from patient, collection time, equation and
// assumed sex alone: a limitation documented in the package documentation.
func (x *Extraction) withdrawnIdentities(g *Group, w Withdrawal, input *Observation) []string {
	reg := x.equations
	if reg == nil {
		reg = calc.Builtin()
	}
	var uses []calc.Analyte
	if e, ok := reg.Latest(w.Equation); ok {
		uses = e.Uses()
	} else if input != nil && primary(input.Analyte) {
		uses = []calc.Analyte{input.Analyte}
	}
	if len(uses) == 0 {
		return nil
	}
	var inputs []*Observation
	for _, a := range uses {
		found := g.inputOf(a, input)
		if found == nil {
			return nil
		}
		inputs = append(inputs, found)
	}
	return identities(inputs, uses)
}

// inputOf returns the group's input of analyte a: self when it is of that
// analyte, else the first usable input, else the first withdrawn, else
// the first other (each in request order); nil when there is none.
func (g *Group) inputOf(a calc.Analyte, self *Observation) *Observation {
	if self != nil && self.Analyte == a {
		return self
	}
	for _, o := range g.Inputs {
		if o.Analyte == a && o.Action == hl7v2.StatusCompute {
			return o
		}
	}
	for _, o := range slices.Concat(g.Withdrawn, g.Inputs) {
		if o.Analyte == a {
			return o
		}
	}
	return nil
}

// splitComparator splits a reported value such as ">90" into its
// comparator and number.
func splitComparator(s string) (cmp, num string) {
	for _, c := range []string{">=", "<=", ">", "<"} {
		if rest, ok := strings.CutPrefix(s, c); ok {
			return c, strings.TrimSpace(rest)
		}
	}
	return "", s
}

// isDecimal reports whether s is a FHIR decimal (FHIR R4 datatypes,
// decimal: -?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?).
func isDecimal(s string) bool {
	i := 0
	if strings.HasPrefix(s, "-") {
		i++
	}
	digits := func() int {
		n := 0
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			i++
			n++
		}
		return n
	}
	start := i
	n := digits()
	if n == 0 || (n > 1 && s[start] == '0') {
		return false
	}
	if i < len(s) && s[i] == '.' {
		i++
		if digits() == 0 {
			return false
		}
	}
	if i < len(s) && (s[i] == 'e' || s[i] == 'E') {
		i++
		if i < len(s) && (s[i] == '+' || s[i] == '-') {
			i++
		}
		if digits() == 0 {
			return false
		}
	}
	return i == len(s)
}

// operationOutcome builds an OperationOutcome of issues.
func operationOutcome(issues []Issue) *oopb.OperationOutcome {
	oo := &oopb.OperationOutcome{}
	for _, is := range issues {
		sev := cpb.IssueSeverityCode_Value(cpb.IssueSeverityCode_Value_value[enumName(is.Severity)])
		if sev == cpb.IssueSeverityCode_INVALID_UNINITIALIZED {
			sev = cpb.IssueSeverityCode_ERROR
		}
		typ := cpb.IssueTypeCode_Value(cpb.IssueTypeCode_Value_value[enumName(is.Code)])
		if typ == cpb.IssueTypeCode_INVALID_UNINITIALIZED {
			typ = cpb.IssueTypeCode_PROCESSING
		}
		oi := &oopb.OperationOutcome_Issue{
			Severity: &oopb.OperationOutcome_Issue_SeverityCode{Value: sev},
			Code:     &oopb.OperationOutcome_Issue_CodeType{Value: typ},
		}
		diag := is.Diagnostics
		if diag == "" {
			diag = is.Details
		}
		text := ""
		if is.Details != diag {
			text = is.Details
		}
		switch {
		case is.Reason != "":
			oi.Details = concept(text, coding(SystemRefusal, is.Reason, ""))
		case text != "":
			oi.Details = concept(text)
		}
		if diag != "" {
			oi.Diagnostics = str(diag)
		}
		for _, e := range is.Expression {
			oi.Expression = append(oi.Expression, str(e))
		}
		for _, l := range is.Location {
			oi.Location = append(oi.Location, str(l))
		}
		oo.Issue = append(oo.Issue, oi)
	}
	return oo
}

func enumName(code string) string { return strings.ToUpper(strings.ReplaceAll(code, "-", "_")) }

// OperationOutcome writes an OperationOutcome of issues, for error answers.
func (c *Codec) OperationOutcome(issues []Issue) ([]byte, error) {
	return c.Marshal(&bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_OperationOutcome{OperationOutcome: operationOutcome(issues)}})
}

// Response writes the answer to a request: a Bundle (transaction-response,
// batch-response, or collection for a collection Bundle or a single
// Observation) holding, for a transaction or batch, one entry per request
// entry with status "200 OK" (accepted for calculation; filtrate stores no
// FHIR resources), then the computed Observations and Provenances, then an
// OperationOutcome with refusals and notes.
func (c *Codec) Response(x *Extraction, res []GroupResult, meta Meta) ([]byte, error) {
	b, err := x.build(res, meta, true)
	if err != nil {
		return nil, err
	}
	bt := cpb.BundleTypeCode_COLLECTION
	switch x.Request.BundleType {
	case "transaction":
		bt = cpb.BundleTypeCode_TRANSACTION_RESPONSE
	case "batch":
		bt = cpb.BundleTypeCode_BATCH_RESPONSE
	}
	withResponse := bt != cpb.BundleTypeCode_COLLECTION
	ok := func() *bcrpb.Bundle_Entry_Response {
		if !withResponse {
			return nil
		}
		return &bcrpb.Bundle_Entry_Response{Status: str("200 OK")}
	}
	bundle := &bcrpb.Bundle{
		Type:      &bcrpb.Bundle_TypeCode{Value: bt},
		Timestamp: instant(meta.Now),
	}
	if withResponse {
		for range x.Request.entryCount() {
			bundle.Entry = append(bundle.Entry, &bcrpb.Bundle_Entry{Response: ok()})
		}
	}
	for _, r := range b.resources {
		bundle.Entry = append(bundle.Entry, &bcrpb.Bundle_Entry{FullUrl: uri(r.fullURL), Resource: r.res, Response: ok()})
	}
	oo := &bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_OperationOutcome{OperationOutcome: operationOutcome(b.issues)}}
	bundle.Entry = append(bundle.Entry, &bcrpb.Bundle_Entry{
		FullUrl: uri("urn:uuid:" + uuidFrom(x.Request.DedupKey()+"\x00OperationOutcome")), Resource: oo, Response: ok(),
	})
	return c.Marshal(&bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_Bundle{Bundle: bundle}})
}

// Forward writes the transaction Bundle sent downstream: the request's
// resources (an input Observation that gives no eGFR carries a note saying
// why), followed by the computed Observations and Provenances, each PUT to
// its derived id so that a resent, corrected or withdrawn eGFR replaces the
// one sent before. It returns the Bundle id (also its identifier value in
// urn:filtrate:message), which is the outbox message ID. Patients looked up
// from the patient source are not included.
//
// Each request resource is sent with the first of these that applies:
//
//   - a Patient or Observation without a logical id that the sender
//     POSTs, or sends without a request, and that has an identifier with
//     system and value (the one stableIdentifier chooses): a conditional
//     update, PUT [type]?identifier=[system]|[value], so that a corrected
//     or entered-in-error version replaces the one sent before, and a
//     redelivery changes nothing (FHIR R4 http.html#cond-update: no match
//     creates, one match updates, several are an error). A resource with a
//     logical id is not sent so: a server that holds the match under
//     another id would refuse the update;
//   - the sender's own request, as it was;
//   - PUT [type]/[id] when it has a logical id;
//   - otherwise POST [type] without a condition: nothing identifies the
//     resource, so a redelivery after a lost acknowledgement could create
//     it twice.
func (c *Codec) Forward(x *Extraction, res []GroupResult, meta Meta) (id string, payload []byte, err error) {
	b, err := x.build(res, meta, false)
	if err != nil {
		return "", nil, err
	}
	sum := sha256.Sum256([]byte(x.Request.DedupKey()))
	id = "filtrate-" + hex.EncodeToString(sum[:16])
	bundle := &bcrpb.Bundle{
		Id:         &dpb.Id{Value: id},
		Identifier: &dpb.Identifier{System: uri(SystemMessage), Value: str(id)},
		Type:       &bcrpb.Bundle_TypeCode{Value: cpb.BundleTypeCode_TRANSACTION},
		Timestamp:  instant(meta.Now),
	}
	for _, e := range x.Request.entries {
		cr := clone(e.res)
		if o := cr.GetObservation(); o != nil {
			for _, n := range b.notes[e] {
				o.Note = append(o.Note, &dpb.Annotation{Text: markdown(n)})
			}
		}
		typ, rid := resourceTypeID(cr)
		be := &bcrpb.Bundle_Entry{Resource: cr}
		switch {
		case e.fullURL != "":
			be.FullUrl = uri(e.fullURL)
		case strings.HasPrefix(e.ref, "urn:uuid:"):
			be.FullUrl = uri(e.ref)
		}
		sys, val, hasIdentifier := resourceIdentifier(cr)
		creates := e.request == nil || e.request.GetMethod().GetValue() == cpb.HTTPVerbCode_POST
		fullURL := false // a urn:uuid fullUrl is needed for references to it
		switch {
		case rid == "" && hasIdentifier && creates:
			be.Request = entryRequest(cpb.HTTPVerbCode_PUT, conditionalURL(typ, sys, val))
			fullURL = true
		case e.request != nil:
			be.Request = clone(e.request)
		case rid != "":
			be.Request = entryRequest(cpb.HTTPVerbCode_PUT, typ+"/"+rid)
		default:
			be.Request = entryRequest(cpb.HTTPVerbCode_POST, typ)
			fullURL = true
		}
		if fullURL && be.FullUrl == nil {
			be.FullUrl = uri("urn:uuid:" + uuidFrom(x.Request.DedupKey()+"\x00"+e.expr))
		}
		bundle.Entry = append(bundle.Entry, be)
	}
	for _, r := range b.resources {
		bundle.Entry = append(bundle.Entry, &bcrpb.Bundle_Entry{
			FullUrl: uri(r.fullURL), Resource: r.res, Request: entryRequest(cpb.HTTPVerbCode_PUT, r.typ+"/"+r.id),
		})
	}
	payload, err = c.Marshal(&bcrpb.ContainedResource{OneofResource: &bcrpb.ContainedResource_Bundle{Bundle: bundle}})
	if err != nil {
		return "", nil, err
	}
	return id, payload, nil
}

func entryRequest(method cpb.HTTPVerbCode_Value, url string) *bcrpb.Bundle_Entry_Request {
	return &bcrpb.Bundle_Entry_Request{
		Method: &bcrpb.Bundle_Entry_Request_MethodCode{Value: method},
		Url:    uri(url),
	}
}

// resourceTypeID returns the resource type (the message name, which is the
// FHIR type name) and the logical id of a contained resource.
func resourceTypeID(cr *bcrpb.ContainedResource) (typ, id string) {
	m := cr.ProtoReflect()
	od := m.Descriptor().Oneofs().ByName("oneof_resource")
	if od == nil {
		return "", ""
	}
	fd := m.WhichOneof(od)
	if fd == nil {
		return "", ""
	}
	r := m.Get(fd).Message()
	typ = string(r.Descriptor().Name())
	if idf := r.Descriptor().Fields().ByName("id"); idf != nil && r.Has(idf) {
		idm := r.Get(idf).Message()
		if vf := idm.Descriptor().Fields().ByName("value"); vf != nil && vf.Kind() == protoreflect.StringKind {
			id = idm.Get(vf).String()
		}
	}
	return typ, id
}

// resourceIdentifier returns the identifier (stableIdentifier) of a
// Patient or Observation; ok is false for other resources and for those
// without an identifier with system and value.
func resourceIdentifier(cr *bcrpb.ContainedResource) (system, value string, ok bool) {
	switch {
	case cr.GetObservation() != nil:
		return stableIdentifier(cr.GetObservation().GetIdentifier())
	case cr.GetPatient() != nil:
		return stableIdentifier(cr.GetPatient().GetIdentifier())
	}
	return "", "", false
}

// conditionalURL is the url of a conditional update on an identifier:
// [type]?identifier=[system]|[value], system and value query-escaped and
// the separator "|" literal (FHIR R4 search.html#token).
func conditionalURL(typ, system, value string) string {
	return typ + "?identifier=" + url.QueryEscape(system) + "|" + url.QueryEscape(value)
}
