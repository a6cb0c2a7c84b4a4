package audit

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"net/url"
	"strconv"
	"time"

	"filtrate/calc"
	"filtrate/internal/pipeline"
	"filtrate/store"
)

// Identifier systems and extension URLs of the FHIR export. filtrate
// publishes no StructureDefinitions, so they are URNs (valid FHIR uri
// values) rather than resolvable canonical URLs.
const (
	// SystemAuditRecord identifies a record (and so the eGFR it documents)
	// by its audit record ID.
	SystemAuditRecord = "urn:filtrate:audit-record"
	// SystemMessagePrefix + transport ("hl7v2", "fhir") identifies a
	// source message by its control ID.
	SystemMessagePrefix = "urn:filtrate:message:"
	// SystemOutputMessage identifies the enriched message sent on.
	SystemOutputMessage = "urn:filtrate:output-message"
	// SystemEquation codes the equation: code = ID, version = version.
	SystemEquation = "urn:filtrate:equation"
	// SystemSuppression codes a suppression reason.
	SystemSuppression = "urn:filtrate:suppression"

	ExtensionEquation    = "urn:filtrate:fhir:extension:equation"
	ExtensionConfigHash  = "urn:filtrate:fhir:extension:config-hash"
	ExtensionSuppression = "urn:filtrate:fhir:extension:suppression"
	ExtensionContentHash = "urn:filtrate:fhir:extension:content-hash"
	ExtensionPrevHash    = "urn:filtrate:fhir:extension:prev-hash"
	ExtensionRawSHA256   = "urn:filtrate:fhir:extension:raw-message-sha256"
	// PolicyPrefix + policy name + ":" + version is Provenance.policy.
	PolicyPrefix = "urn:filtrate:policy:"
)

// Terminology used by the export (FHIR R4, hl7.org/fhir/R4 and
// terminology.hl7.org).
const (
	systemDataOperation   = "http://terminology.hl7.org/CodeSystem/v3-DataOperation"
	systemParticipantType = "http://terminology.hl7.org/CodeSystem/provenance-participant-type"
	systemAuditEventType  = "http://terminology.hl7.org/CodeSystem/audit-event-type"
	systemRestful         = "http://hl7.org/fhir/restful-interaction"
	systemSourceType      = "http://terminology.hl7.org/CodeSystem/security-source-type"
	systemEntityType      = "http://terminology.hl7.org/CodeSystem/audit-entity-type"
	systemObjectRole      = "http://terminology.hl7.org/CodeSystem/object-role"
	systemDICOM           = "http://dicom.nema.org/resources/ontology/DCM"
)

// FHIROptions adjust the FHIR export.
type FHIROptions struct {
	// Now stamps Bundle.timestamp; nil means time.Now.
	Now func() time.Time
	// Calculator names the equations (Coding.display); nil means the
	// builtin registry.
	Calculator *calc.Calculator
	// WithoutAuditEvents leaves out the AuditEvent resources.
	WithoutAuditEvents bool
}

// FHIRWriter writes records as one FHIR R4 Bundle of type "collection",
// streaming: the Bundle is opened on the first Write (or Close) and closed
// by Close. Per record it holds a Provenance and, unless
// FHIROptions.WithoutAuditEvents, an AuditEvent.
//
// Provenance "filtrate-audit-ID" (FHIR R4 Provenance):
//   - target: the eGFR the record documents, as a logical reference
//     (type Observation, identifier SystemAuditRecord|ID, display naming
//     the equation and the output message). filtrate does not know the id
//     a receiving server gives the Observation, so no literal reference.
//   - recorded: the record's RecordedAt; policy: PolicyPrefix+name:version.
//   - activity: v3-DataOperation CREATE, or NULLIFY for a withdrawn input.
//   - agent: type "assembler", who = the contained Device "filtrate" whose
//     version is the record's software version.
//   - entity: role "source", what = the source message (identifier
//     SystemMessagePrefix+transport | control ID), with the raw message's
//     SHA-256 in extension ExtensionRawSHA256.
//   - extensions: ExtensionEquation (valueCoding SystemEquation, code =
//     equation ID, version = equation version), ExtensionConfigHash,
//     ExtensionSuppression (valueCoding SystemSuppression, code = reason
//     code, display = its text), ExtensionContentHash, ExtensionPrevHash.
//   - signature: omitted (the hash chain is the integrity evidence).
//
// AuditEvent "filtrate-audit-event-ID" (FHIR R4 AuditEvent):
//   - type: audit-event-type "rest"; subtype: restful-interaction
//     "create" (action C) or, for a withdrawn input, "delete" (action D).
//   - recorded: RecordedAt; outcome "0" (success) when a value was
//     reported or an input withdrawn, "4" (minor failure) when no eGFR
//     was reported, with outcomeDesc giving the reason code and text.
//   - agent: the contained Device, type DICOM 110150 "Application",
//     requestor false; source: observer = the Device, type
//     security-source-type 4 "Application Server".
//   - entity: the Provenance (audit-entity-type 2 "System Object",
//     object-role 4 "Domain Resource") and the source message (type 2,
//     role 3 "Report", identifier as above).
//
// The export holds no patient data: no patient identifier, date of birth,
// sex or result value. A receiving system links the Provenance to the
// Observation, and so to the patient, through the identifiers.
type FHIRWriter struct {
	w      *bufio.Writer
	opts   FHIROptions
	reg    *calc.Registry
	opened bool
	n      int
	err    error
}

// NewFHIRWriter returns a FHIRWriter on w.
func NewFHIRWriter(w io.Writer, opts FHIROptions) *FHIRWriter {
	if opts.Now == nil {
		opts.Now = time.Now
	}
	c := opts.Calculator
	if c == nil {
		c = calc.NewCalculator(calc.Builtin())
	}
	return &FHIRWriter{w: bufio.NewWriter(w), opts: opts, reg: c.Registry()}
}

// bundleHead opens the Bundle; entries follow, then "]}".
type bundleHead struct {
	ResourceType string `json:"resourceType"`
	Type         string `json:"type"`
	Timestamp    string `json:"timestamp"`
}

func (f *FHIRWriter) open() {
	if f.opened || f.err != nil {
		return
	}
	f.opened = true
	head, err := json.Marshal(bundleHead{ResourceType: "Bundle", Type: "collection", Timestamp: instant(f.opts.Now())})
	if err != nil {
		f.err = err
		return
	}
	// Replace the closing brace with the start of the entry array.
	f.write(head[:len(head)-1])
	f.write([]byte(`,"entry":[`))
}

func (f *FHIRWriter) write(b []byte) {
	if f.err == nil {
		_, f.err = f.w.Write(b)
	}
}

func (f *FHIRWriter) entry(resource any) {
	b, err := json.Marshal(struct {
		Resource any `json:"resource"`
	}{resource})
	if err != nil {
		f.err = fmt.Errorf("audit: encode FHIR resource: %w", err)
		return
	}
	if f.n > 0 {
		f.write([]byte(",\n"))
	} else {
		f.write([]byte("\n"))
	}
	f.write(b)
	f.n++
}

// Write implements RecordWriter.
func (f *FHIRWriter) Write(rec store.AuditRecord) error {
	f.open()
	f.entry(f.provenance(rec))
	if !f.opts.WithoutAuditEvents {
		f.entry(f.auditEvent(rec))
	}
	if f.err != nil {
		return fmt.Errorf("audit: write FHIR: %w", f.err)
	}
	return nil
}

// Close implements RecordWriter.
func (f *FHIRWriter) Close() error {
	f.open()
	f.write([]byte("\n]}\n"))
	if f.err == nil {
		f.err = f.w.Flush()
	}
	if f.err != nil {
		return fmt.Errorf("audit: write FHIR: %w", f.err)
	}
	return nil
}

// FHIR R4 data types, only the elements the export uses.
type (
	fhirCoding struct {
		System  string `json:"system,omitempty"`
		Version string `json:"version,omitempty"`
		Code    string `json:"code,omitempty"`
		Display string `json:"display,omitempty"`
	}
	fhirCodeableConcept struct {
		Coding []fhirCoding `json:"coding,omitempty"`
		Text   string       `json:"text,omitempty"`
	}
	fhirIdentifier struct {
		System string `json:"system,omitempty"`
		Value  string `json:"value,omitempty"`
	}
	fhirReference struct {
		Reference  string          `json:"reference,omitempty"`
		Type       string          `json:"type,omitempty"`
		Identifier *fhirIdentifier `json:"identifier,omitempty"`
		Display    string          `json:"display,omitempty"`
	}
	fhirExtension struct {
		URL         string      `json:"url"`
		ValueString string      `json:"valueString,omitempty"`
		ValueCoding *fhirCoding `json:"valueCoding,omitempty"`
	}
	fhirDevice struct {
		ResourceType string `json:"resourceType"`
		ID           string `json:"id"`
		DeviceName   []struct {
			Name string `json:"name"`
			Type string `json:"type"`
		} `json:"deviceName"`
		Version []struct {
			Value string `json:"value"`
		} `json:"version,omitempty"`
	}
)

// fhirProvenance is a FHIR R4 Provenance resource (see FHIRWriter).
type fhirProvenance struct {
	ResourceType string              `json:"resourceType"`
	ID           string              `json:"id"`
	Contained    []any               `json:"contained,omitempty"`
	Extension    []fhirExtension     `json:"extension,omitempty"`
	Target       []fhirReference     `json:"target"`
	Recorded     string              `json:"recorded"`
	Policy       []string            `json:"policy,omitempty"`
	Activity     fhirCodeableConcept `json:"activity"`
	Agent        []provenanceAgent   `json:"agent"`
	Entity       []provenanceEntity  `json:"entity,omitempty"`
}

type provenanceAgent struct {
	Type fhirCodeableConcept `json:"type"`
	Who  fhirReference       `json:"who"`
}

type provenanceEntity struct {
	Extension []fhirExtension `json:"extension,omitempty"`
	Role      string          `json:"role"`
	What      fhirReference   `json:"what"`
}

// fhirAuditEvent is a FHIR R4 AuditEvent resource (see FHIRWriter).
type fhirAuditEvent struct {
	ResourceType string             `json:"resourceType"`
	ID           string             `json:"id"`
	Contained    []any              `json:"contained,omitempty"`
	Type         fhirCoding         `json:"type"`
	Subtype      []fhirCoding       `json:"subtype,omitempty"`
	Action       string             `json:"action"`
	Recorded     string             `json:"recorded"`
	Outcome      string             `json:"outcome"`
	OutcomeDesc  string             `json:"outcomeDesc,omitempty"`
	Agent        []auditEventAgent  `json:"agent"`
	Source       auditEventSource   `json:"source"`
	Entity       []auditEventEntity `json:"entity,omitempty"`
}

type auditEventAgent struct {
	Type      fhirCodeableConcept `json:"type"`
	Who       fhirReference       `json:"who"`
	Requestor bool                `json:"requestor"`
}

type auditEventSource struct {
	Observer fhirReference `json:"observer"`
	Type     []fhirCoding  `json:"type,omitempty"`
}

type auditEventEntity struct {
	What fhirReference `json:"what"`
	Type *fhirCoding   `json:"type,omitempty"`
	Role *fhirCoding   `json:"role,omitempty"`
	Name string        `json:"name,omitempty"`
}

// deviceID is the id of the contained Device that stands for filtrate.
const deviceID = "filtrate"

func device(version string) fhirDevice {
	d := fhirDevice{ResourceType: "Device", ID: deviceID}
	d.DeviceName = append(d.DeviceName, struct {
		Name string `json:"name"`
		Type string `json:"type"`
	}{Name: "filtrate", Type: "manufacturer-name"})
	if version != "" {
		d.Version = append(d.Version, struct {
			Value string `json:"value"`
		}{Value: version})
	}
	return d
}

func deviceRef(version string) fhirReference {
	display := "filtrate"
	if version != "" {
		display += " " + version
	}
	return fhirReference{Reference: "#" + deviceID, Display: display}
}

func instant(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }

func sourceMessageRef(rec store.AuditRecord) fhirReference {
	r := fhirReference{Display: rec.Transport + " message " + rec.MessageID}
	if rec.MessageID != "" {
		r.Identifier = &fhirIdentifier{System: SystemMessagePrefix + url.PathEscape(rec.Transport), Value: rec.MessageID}
	}
	return r
}

func provenanceID(id int64) string { return "filtrate-audit-" + strconv.FormatInt(id, 10) }

// provenance returns the Provenance resource for rec.
func (f *FHIRWriter) provenance(rec store.AuditRecord) fhirProvenance {
	withdrawn := rec.SuppressionCode == pipeline.ReasonWithdrawn
	p := fhirProvenance{
		ResourceType: "Provenance",
		ID:           provenanceID(rec.ID),
		Contained:    []any{device(rec.SoftwareVersion)},
		Recorded:     instant(rec.RecordedAt),
		Activity:     fhirCodeableConcept{Coding: []fhirCoding{{System: systemDataOperation, Code: "CREATE", Display: "create"}}},
		Agent: []provenanceAgent{{
			Type: fhirCodeableConcept{Coding: []fhirCoding{{System: systemParticipantType, Code: "assembler", Display: "Assembler"}}},
			Who:  deviceRef(rec.SoftwareVersion),
		}},
	}
	if withdrawn {
		p.Activity.Coding[0].Code, p.Activity.Coding[0].Display = "NULLIFY", "nullify"
	}
	display := "eGFR"
	if rec.Equation != "" {
		display += " " + rec.Equation
	}
	if rec.OutputMessageID != "" {
		display += " in output message " + rec.OutputMessageID
	}
	p.Target = []fhirReference{{
		Type:       "Observation",
		Identifier: &fhirIdentifier{System: SystemAuditRecord, Value: strconv.FormatInt(rec.ID, 10)},
		Display:    display,
	}}
	if rec.Policy != "" {
		p.Policy = []string{PolicyPrefix + url.PathEscape(rec.Policy) + ":" + url.PathEscape(rec.PolicyVersion)}
	}
	src := provenanceEntity{Role: "source", What: sourceMessageRef(rec)}
	if rec.RawHash != "" {
		src.Extension = []fhirExtension{{URL: ExtensionRawSHA256, ValueString: rec.RawHash}}
	}
	p.Entity = []provenanceEntity{src}
	if rec.Equation != "" {
		c := &fhirCoding{System: SystemEquation, Version: rec.EquationVersion, Code: rec.Equation}
		if e, ok := f.reg.Get(rec.Equation, rec.EquationVersion); ok {
			c.Display = e.Name
		}
		p.Extension = append(p.Extension, fhirExtension{URL: ExtensionEquation, ValueCoding: c})
	}
	if rec.ConfigHash != "" {
		p.Extension = append(p.Extension, fhirExtension{URL: ExtensionConfigHash, ValueString: rec.ConfigHash})
	}
	if rec.SuppressionCode != "" {
		p.Extension = append(p.Extension, fhirExtension{URL: ExtensionSuppression, ValueCoding: &fhirCoding{
			System: SystemSuppression, Code: rec.SuppressionCode, Display: rec.SuppressionText,
		}})
	}
	if rec.ContentHash != "" {
		p.Extension = append(p.Extension, fhirExtension{URL: ExtensionContentHash, ValueString: rec.ContentHash})
	}
	if rec.PrevHash != "" {
		p.Extension = append(p.Extension, fhirExtension{URL: ExtensionPrevHash, ValueString: rec.PrevHash})
	}
	return p
}

// auditEvent returns the AuditEvent resource for rec.
func (f *FHIRWriter) auditEvent(rec store.AuditRecord) fhirAuditEvent {
	withdrawn := rec.SuppressionCode == pipeline.ReasonWithdrawn
	e := fhirAuditEvent{
		ResourceType: "AuditEvent",
		ID:           "filtrate-audit-event-" + strconv.FormatInt(rec.ID, 10),
		Contained:    []any{device(rec.SoftwareVersion)},
		Type:         fhirCoding{System: systemAuditEventType, Code: "rest", Display: "RESTful Operation"},
		Subtype:      []fhirCoding{{System: systemRestful, Code: "create", Display: "create"}},
		Action:       "C",
		Recorded:     instant(rec.RecordedAt),
		Outcome:      "0",
		Agent: []auditEventAgent{{
			Type:      fhirCodeableConcept{Coding: []fhirCoding{{System: systemDICOM, Code: "110150", Display: "Application"}}},
			Who:       deviceRef(rec.SoftwareVersion),
			Requestor: false,
		}},
		Source: auditEventSource{
			Observer: deviceRef(rec.SoftwareVersion),
			Type:     []fhirCoding{{System: systemSourceType, Code: "4", Display: "Application Server"}},
		},
		Entity: []auditEventEntity{
			{
				What: fhirReference{Reference: "Provenance/" + provenanceID(rec.ID)},
				Type: &fhirCoding{System: systemEntityType, Code: "2", Display: "System Object"},
				Role: &fhirCoding{System: systemObjectRole, Code: "4", Display: "Domain Resource"},
			},
			{
				What: sourceMessageRef(rec),
				Type: &fhirCoding{System: systemEntityType, Code: "2", Display: "System Object"},
				Role: &fhirCoding{System: systemObjectRole, Code: "3", Display: "Report"},
			},
		},
	}
	switch {
	case withdrawn:
		e.Action = "D"
		e.Subtype[0].Code, e.Subtype[0].Display = "delete", "delete"
		e.OutcomeDesc = rec.SuppressionCode + ": " + rec.SuppressionText
	case rec.SuppressionCode != "":
		e.Outcome = "4"
		e.OutcomeDesc = rec.SuppressionCode + ": " + rec.SuppressionText
	}
	return e
}
