package fhir

import (
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"net/http"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"

	"github.com/google/fhir/go/jsonformat"
	dpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/datatypes_go_proto"
	bcrpb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/bundle_and_contained_resource_go_proto"
	opb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/observation_go_proto"
	ppb "github.com/google/fhir/go/proto/google/fhir/proto/r4/core/resources/patient_go_proto"
	"google.golang.org/protobuf/types/known/anypb"

	"filtrate/calc"
	"filtrate/hl7v2"
)

// Request is a decoded, validated request.
type Request struct {
	Endpoint Endpoint
	// BundleType is transaction, batch or collection; empty for a single
	// Observation.
	BundleType string
	// Identifier is Bundle.identifier as system|value; empty when absent.
	Identifier string
	// BodyHash is the hex SHA-256 of the request body.
	BodyHash string

	entries  []*entry
	nEntries int // Bundle.entry count, with entries without a resource
}

// entryCount is the number of Bundle entries of the request.
func (r *Request) entryCount() int { return r.nEntries }

// entry is one resource of the request.
type entry struct {
	index   int    // position in Bundle.entry; -1 for a single Observation
	expr    string // FHIRPath of the resource
	fullURL string
	res     *bcrpb.ContainedResource
	request *bcrpb.Bundle_Entry_Request
	// ref is how outputs refer to this resource (set by Extract for
	// input Observations).
	ref string
}

// DedupKey identifies the request so that a resent copy is recognised:
// "fhir|" followed by Bundle.identifier as system|value and "|" when
// present, then the hex SHA-256 of the request body.
//
// The body hash is part of the key even when the Bundle has an identifier:
// a sender that reuses an identifier (a counter reset, a copied template)
// for different content must not have that content dropped as a
// duplicate, which would leave results without their eGFR, or a stale eGFR
// without its correction. Resending the identical bytes, as a sender does
// after a lost answer, is still recognised as a duplicate.
func (r *Request) DedupKey() string {
	if r.Identifier != "" {
		return "fhir|" + r.Identifier + "|" + r.BodyHash
	}
	return "fhir|" + r.BodyHash
}

// MessageID is the message identifier written to the audit records:
// Bundle.identifier as system|value, otherwise "sha256:" and the hex
// SHA-256 of the body.
func (r *Request) MessageID() string {
	if r.Identifier != "" {
		return r.Identifier
	}
	return "sha256:" + r.BodyHash
}

// ErrPatientNotFound is returned by a LookupPatient function when the
// patient source has no such Patient; Extract turns it into a 422.
var ErrPatientNotFound = errors.New("fhir: patient not found")

// LookupError reports that a patient could not be looked up (the source
// failed, not the request). It never names the patient.
type LookupError struct {
	Err error
}

// Error describes the failure without naming the patient.
func (e *LookupError) Error() string { return "fhir: patient lookup failed: " + e.Err.Error() }

// Unwrap returns the underlying error.
func (e *LookupError) Unwrap() error { return e.Err }

// ExtractOptions configure Extract.
type ExtractOptions struct {
	// Codes maps codings to analytes; default hl7v2.DefaultCodeMap().
	Codes *hl7v2.CodeMap
	// LookupPatient returns the Patient with the given logical id from the
	// patient source, for a subject "Patient/[id]" that the request does
	// not hold. nil: such a subject is an input error. It should return
	// ErrPatientNotFound (possibly wrapped) when the source has no such
	// Patient; any other error makes Extract fail with a *LookupError.
	LookupPatient func(id string) (*ppb.Patient, error)
	// Location is the laboratory's time zone: collection times are read
	// as dates in it, so that age is counted from the calendar date at the
	// laboratory (as HL7 v2 times are). A date without a time is that date
	// in Location. nil keeps each time in its own UTC offset.
	Location *time.Location
	// Equations tells which measured inputs an equation uses, so that a
	// withdrawal is written with the id its result was written to (see
	// the package documentation, Identity); default calc.Builtin().
	Equations *calc.Registry
}

// StatusAction classifies Observation.status for eGFR; the values are
// those of the HL7 v2 adapter.
type StatusAction = hl7v2.StatusAction

// ClassifyStatus maps Observation.status (FHIR R4 ObservationStatus) to
// what it means for a derived eGFR: final, amended, corrected and
// preliminary are used; cancelled cancels; entered-in-error withdraws;
// registered is pending; anything else (unknown) is unknown.
func ClassifyStatus(status string) StatusAction {
	switch status {
	case "final", "amended", "corrected", "preliminary":
		return hl7v2.StatusCompute
	case "cancelled":
		return hl7v2.StatusCancel
	case "entered-in-error":
		return hl7v2.StatusRetract
	case "registered":
		return hl7v2.StatusPending
	default:
		return hl7v2.StatusUnknown
	}
}

// Patient is a patient that input Observations refer to.
type Patient struct {
	// ID identifies the patient: of the Patient.identifiers with both a
	// system and a value, the lexicographically smallest system|value, so
	// that the order in which a sender lists them does not matter. It
	// names the patient in the audit trail and keys the ids of the eGFR
	// Observations; a Patient without one is refused (see Extract).
	ID string
	// BirthDateText and Gender are as received.
	BirthDateText string
	Gender        string
	// BirthDate is set when birthDate is a full date.
	BirthDate time.Time
	Sex       calc.Sex

	key       string
	subject   string     // reference for output subjects
	contained *anypb.Any // set when the Patient is contained in an input
}

// Observation is one input Observation.
type Observation struct {
	// SourceID is Observation.id, else the entry's fullUrl, else its
	// position in the request.
	SourceID string
	// Expression names the resource in the request (FHIRPath).
	Expression string
	Analyte    calc.Analyte
	// Status is Observation.status as received.
	Status      string
	Action      StatusAction
	Measurement calc.Measurement
	// CollectedAt is the collection time when precise to the day.
	CollectedAt time.Time
	Patient     *Patient

	// identity is what keys the ids of the eGFRs calculated from this
	// Observation (see observationIdentity); empty when it has none.
	identity  string
	effective *dpb.DateTime // as received, copied to outputs
	entry     *entry
}

// Group is one calculation: the inputs of one patient and collection time.
type Group struct {
	// Key names the group in errors ("G1", "G2", ...).
	Key     string
	Patient *Patient
	// CollectedAt is the collection time (zero when unknown or imprecise).
	CollectedAt time.Time
	// Compute is true when a creatinine, cystatin C or urine creatinine
	// input has a usable status.
	Compute bool
	// Request holds sex, date of birth, collection time and measurements;
	// the caller adds the policy.
	Request calc.Request
	// Inputs are the group's own input Observations, Borrowed the height
	// and weight taken from elsewhere in the request. Inputs holds height,
	// weight and the other qualifying inputs in every status (only usable
	// ones are calculated from), so that the caller can withdraw an eGFR
	// made with a height or weight now entered in error or cancelled.
	Inputs   []*Observation
	Borrowed []*Observation
	// Withdrawn lists the creatinine, cystatin C and urine creatinine
	// inputs whose status withdraws them: entered-in-error or cancelled.
	// They are not in Inputs.
	Withdrawn []*Observation

	effective *dpb.DateTime
}

// Extraction is what a request asks to calculate.
type Extraction struct {
	Request *Request
	Groups  []*Group
	// Notes explain inputs that give no eGFR because of their status.
	Notes []Issue
	// Inputs are every input Observation, in request order.
	Inputs []*Observation

	equations *calc.Registry
}

// primary reports the analytes an eGFR is calculated from (as opposed to
// height and weight, which only qualify it).
func primary(a calc.Analyte) bool {
	return a == calc.Creatinine || a == calc.CystatinC || a == calc.UrineCreatinine
}

// Extract reads the calculation inputs of a request. A recognised input
// Observation without a resolvable Patient subject, or whose Patient has
// no identifier with system and value, is an *InputError (422): an eGFR
// that cannot be tied to a patient identity must not be forwarded, and the
// ids of eGFR Observations are derived from that identity. A failed patient
// lookup is a *LookupError.
func (r *Request) Extract(opts ExtractOptions) (*Extraction, error) {
	codes := opts.Codes
	if codes == nil {
		codes = hl7v2.DefaultCodeMap()
	}
	x := &Extraction{Request: r, equations: opts.Equations}
	res := &resolver{req: r, lookup: opts.LookupPatient, patients: map[string]*Patient{}}
	res.index()
	for i, e := range r.entries {
		o := e.res.GetObservation()
		if o == nil {
			continue
		}
		entryKey := e.fullURL
		if entryKey == "" {
			entryKey = fmt.Sprintf("%s#%d", r.DedupKey(), i)
		}
		obs, err := readObservation(e, o, codes, opts.Location)
		if err != nil {
			return nil, err
		}
		if obs == nil {
			continue
		}
		switch {
		case e.fullURL != "":
			e.ref = e.fullURL
		case o.GetId().GetValue() != "":
			e.ref = "Observation/" + o.GetId().GetValue()
		default:
			e.ref = "urn:uuid:" + uuidFrom(entryKey)
		}
		if obs.SourceID == "" {
			obs.SourceID, obs.Measurement.SourceID = e.ref, e.ref
		}
		p, err := res.subject(e, o)
		if err != nil {
			return nil, err
		}
		obs.Patient = p
		x.Inputs = append(x.Inputs, obs)
	}
	x.group()
	return x, nil
}

// group builds the calculation groups, mirroring the HL7 v2 adapter: a
// group per patient and collection time with a creatinine, cystatin C or
// urine creatinine input that is usable, withdrawn or cancelled.
func (x *Extraction) group() {
	type gkey struct {
		patient string
		at      int64
		known   bool
	}
	keyOf := func(o *Observation) gkey {
		if o.CollectedAt.IsZero() {
			return gkey{patient: o.Patient.key}
		}
		return gkey{patient: o.Patient.key, at: o.CollectedAt.UnixMicro(), known: true}
	}
	groups := map[gkey]*Group{}
	for _, o := range x.Inputs {
		if !primary(o.Analyte) {
			continue
		}
		switch o.Action {
		case hl7v2.StatusCancel:
			x.Notes = append(x.Notes, note(o, "eGFR not calculated: the result was cancelled (status cancelled)."))
		case hl7v2.StatusUnknown:
			x.Notes = append(x.Notes, note(o, "eGFR not calculated: the result's status is not final, amended, corrected or preliminary."))
			continue
		case hl7v2.StatusPending:
			continue
		}
		k := keyOf(o)
		g := groups[k]
		if g == nil {
			g = &Group{Key: "G" + strconv.Itoa(len(x.Groups)+1), Patient: o.Patient, CollectedAt: o.CollectedAt, effective: o.effective}
			groups[k] = g
			x.Groups = append(x.Groups, g)
		}
		switch o.Action {
		case hl7v2.StatusRetract:
			g.Withdrawn = append(g.Withdrawn, o)
			x.Notes = append(x.Notes, note(o, "eGFR withdrawn: the result it was calculated from was entered in error."))
		case hl7v2.StatusCancel:
			g.Withdrawn = append(g.Withdrawn, o)
		default:
			g.Compute = true
		}
	}
	for _, o := range x.Inputs {
		withdrawn := o.Action == hl7v2.StatusRetract || o.Action == hl7v2.StatusCancel
		if g := groups[keyOf(o)]; g != nil && !(primary(o.Analyte) && withdrawn) {
			g.Inputs = append(g.Inputs, o)
		}
	}
	for _, g := range x.Groups {
		req := calc.Request{Sex: g.Patient.Sex, BirthDate: g.Patient.BirthDate, CollectedAt: g.CollectedAt}
		if g.Compute {
			own := map[calc.Analyte]bool{}
			for _, o := range g.Inputs {
				if o.Action == hl7v2.StatusCompute {
					req.Measurements = append(req.Measurements, o.Measurement)
					own[o.Analyte] = true
				}
			}
			for _, a := range []calc.Analyte{calc.Height, calc.Weight} {
				if own[a] {
					continue
				}
				for _, o := range x.Inputs {
					if o.Analyte == a && o.Patient == g.Patient && o.Action == hl7v2.StatusCompute {
						req.Measurements = append(req.Measurements, o.Measurement)
						g.Borrowed = append(g.Borrowed, o)
					}
				}
			}
		}
		g.Request = req
	}
}

func note(o *Observation, text string) Issue {
	return Issue{Severity: "information", Code: "informational", Details: text, Diagnostics: text, Expression: []string{o.Expression}}
}

// readObservation returns the input an Observation carries, or nil when
// none of its codings is mapped.
func readObservation(e *entry, o *opb.Observation, codes *hl7v2.CodeMap, loc *time.Location) (*Observation, error) {
	ce, ok := lookupCode(codes, o.GetCode())
	if !ok {
		return nil, nil
	}
	status := enumCode(o.GetStatus().GetValue().String())
	obs := &Observation{
		SourceID:   o.GetId().GetValue(),
		Expression: e.expr,
		Analyte:    ce.Analyte,
		Status:     status,
		Action:     ClassifyStatus(status),
		identity:   observationIdentity(o, e.fullURL),
		entry:      e,
	}
	if obs.SourceID == "" {
		obs.SourceID = e.fullURL
	}
	m := calc.Measurement{Analyte: ce.Analyte, SourceID: obs.SourceID}
	switch v := o.GetValue().GetChoice().(type) {
	case *opb.Observation_ValueX_Quantity:
		q := v.Quantity
		m.ValueText = q.GetValue().GetValue()
		if c, ok := comparatorText[q.GetComparator().GetValue()]; ok && m.ValueText != "" {
			m.ValueText = c + m.ValueText
		}
		m.Unit = strings.TrimSpace(q.GetCode().GetValue())
		if m.Unit == "" {
			m.Unit = strings.TrimSpace(q.GetUnit().GetValue())
		}
	case *opb.Observation_ValueX_StringValue:
		m.ValueText = strings.TrimSpace(v.StringValue.GetValue())
	case *opb.Observation_ValueX_Integer:
		m.ValueText = strconv.Itoa(int(v.Integer.GetValue()))
	}
	if m.Unit == "" {
		m.Unit = ce.Unit
	}
	if meth := o.GetMethod(); meth != nil {
		for _, c := range meth.GetCoding() {
			if m.Method = c.GetCode().GetValue(); m.Method != "" {
				break
			}
		}
		if m.Method == "" {
			m.Method = meth.GetText().GetValue()
		}
	}
	if d := o.GetDevice(); d != nil {
		m.Instrument = d.GetIdentifier().GetValue().GetValue()
		if m.Instrument == "" {
			m.Instrument = d.GetDisplay().GetValue()
		}
	}
	for _, f := range []struct{ name, v string }{
		{"id", m.SourceID}, {"value", m.ValueText}, {"unit", m.Unit}, {"method", m.Method}, {"device", m.Instrument},
	} {
		if !cleanText(f.v) {
			return nil, inputError(http.StatusBadRequest, "value", "text contains a NUL character", e.expr+"."+f.name)
		}
	}
	obs.Measurement = m
	switch eff := o.GetEffective().GetChoice().(type) {
	case *opb.Observation_EffectiveX_DateTime:
		obs.effective = eff.DateTime
	case *opb.Observation_EffectiveX_Period:
		obs.effective = eff.Period.GetStart()
	case *opb.Observation_EffectiveX_Instant:
		if in := eff.Instant; in.GetPrecision() != dpb.Instant_PRECISION_UNSPECIFIED {
			// Instant precisions SECOND, MILLISECOND, MICROSECOND map onto
			// the DateTime precisions of the same names.
			obs.effective = &dpb.DateTime{ValueUs: in.GetValueUs(), Timezone: in.GetTimezone(),
				Precision: dpb.DateTime_SECOND + dpb.DateTime_Precision(in.GetPrecision()-dpb.Instant_SECOND)}
		}
	}
	if t, ok := dateTimeAt(obs.effective); ok {
		obs.CollectedAt = inLocation(t, obs.effective, loc)
	}
	return obs, nil
}

func cleanText(s string) bool { return utf8.ValidString(s) && !strings.ContainsRune(s, 0) }

// lookupCode finds the analyte of the first mapped coding.
func lookupCode(codes *hl7v2.CodeMap, cc *dpb.CodeableConcept) (hl7v2.CodeEntry, bool) {
	d := hl7v2.DefaultDelimiters()
	for _, c := range cc.GetCoding() {
		sys, cd := c.GetSystem().GetValue(), c.GetCode().GetValue()
		if cd == "" {
			continue
		}
		if sys == SystemLOINC {
			sys = "LN"
		}
		seg := hl7v2.NewSegment(d, "OBX", "", "", d.Components(cd, "", sys))
		if e, ok := codes.Lookup(seg.Field(3)); ok {
			return e, true
		}
	}
	return hl7v2.CodeEntry{}, false
}

// inLocation returns a collection time as calc must see it: a time of day
// converted to the laboratory's zone, whose calendar date then gives the
// age (calc.AgeAt); a date alone is midnight of that date in the zone.
// nil loc leaves t as it is.
func inLocation(t time.Time, dt *dpb.DateTime, loc *time.Location) time.Time {
	if loc == nil {
		return t
	}
	if dt.GetPrecision() == dpb.DateTime_DAY {
		y, m, d := t.Date()
		return time.Date(y, m, d, 0, 0, 0, 0, loc)
	}
	return t.In(loc)
}

// resolver finds the Patient an Observation's subject refers to.
type resolver struct {
	req       *Request
	lookup    func(string) (*ppb.Patient, error)
	byFullURL map[string]*entry
	byID      map[string]*entry // "Patient/<id>"
	patients  map[string]*Patient
}

func (rs *resolver) index() {
	rs.byFullURL, rs.byID = map[string]*entry{}, map[string]*entry{}
	for _, e := range rs.req.entries {
		if e.fullURL != "" {
			rs.byFullURL[e.fullURL] = e
		}
		if p := e.res.GetPatient(); p != nil && p.GetId().GetValue() != "" {
			rs.byID["Patient/"+p.GetId().GetValue()] = e
		}
	}
}

func (rs *resolver) subject(e *entry, o *opb.Observation) (*Patient, error) {
	expr := e.expr + ".subject"
	s := o.GetSubject()
	if s == nil {
		return nil, inputError(http.StatusUnprocessableEntity, "required",
			"the Observation has no subject: a Patient is needed to calculate eGFR", expr)
	}
	ref := clone(s)
	if err := jsonformat.DenormalizeReference(ref); err != nil {
		return nil, inputError(http.StatusUnprocessableEntity, "invalid", "the subject reference cannot be read", expr)
	}
	u := ref.GetUri().GetValue()
	notPatient := inputError(http.StatusUnprocessableEntity, "invalid", "the subject must reference a Patient", expr)
	missing := inputError(http.StatusUnprocessableEntity, "not-found",
		"the subject Patient is neither in the request nor available from the patient source", expr)
	switch {
	case u == "":
		return nil, missing
	case strings.HasPrefix(u, "#"):
		key := fmt.Sprintf("contained|%d|%s", e.index, u)
		if p := rs.patients[key]; p != nil {
			return p, nil
		}
		for i, a := range o.GetContained() {
			var cr bcrpb.ContainedResource
			if err := a.UnmarshalTo(&cr); err != nil {
				continue
			}
			pt := cr.GetPatient()
			if pt == nil || "#"+pt.GetId().GetValue() != u {
				continue
			}
			p, err := newPatient(pt, key, u, fmt.Sprintf("%s.contained[%d]", e.expr, i), expr)
			if err != nil {
				return nil, err
			}
			p.contained = a
			rs.patients[key] = p
			return p, nil
		}
		return nil, missing
	}
	if pe := rs.byFullURL[u]; pe != nil {
		return rs.entryPatient(pe, u, notPatient, expr)
	}
	if pe := rs.byID[u]; pe != nil {
		return rs.entryPatient(pe, u, notPatient, expr)
	}
	typ, id, ok := strings.Cut(u, "/")
	if !ok || strings.Contains(id, "/") || strings.Contains(u, ":") {
		return nil, missing
	}
	if typ != "Patient" {
		return nil, notPatient
	}
	key := "external|" + id
	if p := rs.patients[key]; p != nil {
		return p, nil
	}
	if rs.lookup == nil {
		return nil, missing
	}
	pt, err := rs.lookup(id)
	switch {
	case errors.Is(err, ErrPatientNotFound):
		return nil, missing
	case err != nil:
		return nil, &LookupError{Err: err}
	case pt == nil:
		return nil, missing
	}
	p, err := newPatient(pt, key, u, "", expr)
	if err != nil {
		return nil, err
	}
	rs.patients[key] = p
	return p, nil
}

func (rs *resolver) entryPatient(pe *entry, ref string, notPatient *InputError, expr string) (*Patient, error) {
	pt := pe.res.GetPatient()
	if pt == nil {
		return nil, notPatient
	}
	key := "entry|" + strconv.Itoa(pe.index)
	if p := rs.patients[key]; p != nil {
		return p, nil
	}
	p, err := newPatient(pt, key, ref, pe.expr, expr)
	if err != nil {
		return nil, err
	}
	rs.patients[key] = p
	return p, nil
}

// newPatient reads a Patient. patientExpr is its FHIRPath in the request
// (empty for a Patient from the patient source), subjectExpr that of the
// subject referring to it.
//
// The patient is identified only by a Patient.identifier with a system and
// a value. A logical id or a reference ("#pat", a urn:uuid fullUrl) is
// local to one request or server and would give two patients the same key,
// and so the same eGFR Observation ids: one patient's eGFR could replace or
// withdraw another's. Without such an identifier the request is refused.
func newPatient(pt *ppb.Patient, key, ref, patientExpr, subjectExpr string) (*Patient, error) {
	p := &Patient{key: key, subject: ref}
	if sys, v, ok := stableIdentifier(pt.GetIdentifier()); ok {
		p.ID = sys + "|" + v
	}
	if p.ID == "" {
		where := subjectExpr
		if patientExpr != "" {
			where = patientExpr + ".identifier"
		}
		return nil, inputError(http.StatusUnprocessableEntity, "required",
			"the Patient has no identifier with a system and a value (Patient.identifier): an eGFR that cannot be tied to a patient identity is not calculated", where)
	}
	expr := subjectExpr
	p.BirthDateText, p.BirthDate, _ = dateText(pt.GetBirthDate())
	p.Gender = enumCode(pt.GetGender().GetValue().String())
	p.Sex = calc.ParseSex(p.Gender)
	if !cleanText(p.ID) {
		return nil, inputError(http.StatusBadRequest, "value", "the patient identifier contains a NUL character", expr)
	}
	return p, nil
}

// stableIdentifier chooses, of the identifiers with both a system and a
// value, the one whose system|value is lexicographically smallest: the
// same identifier whatever order the sender lists them in, and the same
// in every version of the resource that keeps its identifiers. ok is false
// when no identifier has both.
func stableIdentifier(ids []*dpb.Identifier) (system, value string, ok bool) {
	best := ""
	for _, id := range ids {
		sys, v := id.GetSystem().GetValue(), id.GetValue().GetValue()
		if sys == "" || v == "" {
			continue
		}
		if k := sys + "|" + v; !ok || k < best {
			best, system, value, ok = k, sys, v, true
		}
	}
	return system, value, ok
}

// observationIdentity is the stable identity of an input Observation,
// which keys the ids of the eGFRs calculated from it: its identifier (see
// stableIdentifier) as system|value, else its logical id as
// "Observation/[id]", else its entry's fullUrl; empty when it has none of
// these. A corrected or entered-in-error version of an Observation keeps
// its identifier and id, and so this identity.
func observationIdentity(o *opb.Observation, fullURL string) string {
	if sys, v, ok := stableIdentifier(o.GetIdentifier()); ok {
		return sys + "|" + v
	}
	if id := o.GetId().GetValue(); id != "" {
		return "Observation/" + id
	}
	return fullURL
}

// uuidFrom derives a name-based UUID (RFC 9562 version 8, from SHA-256)
// from s.
func uuidFrom(s string) string {
	h := sha256.Sum256([]byte(s))
	h[6] = h[6]&0x0f | 0x80
	h[8] = h[8]&0x3f | 0x80
	x := hex.EncodeToString(h[:16])
	return x[0:8] + "-" + x[8:12] + "-" + x[12:16] + "-" + x[16:20] + "-" + x[20:32]
}
