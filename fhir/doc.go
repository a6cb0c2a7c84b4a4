// Package fhir translates between FHIR R4 JSON and filtrate's neutral
// calculation types. It parses and validates requests with google/fhir/go
// (jsonformat), extracts the calculation inputs (patients, creatinine,
// cystatin C, height and weight Observations), and builds the answer and
// the enriched transaction Bundle that is forwarded downstream. It does no
// I/O and decides no clinical question: calc does that, and the transport
// in internal/ingest serves HTTP, looks up patients and commits.
//
// # Inputs
//
// A request is either a Bundle (type transaction, batch or collection)
// holding Patients and Observations, or one Observation whose subject is a
// contained Patient ("#id") or a Patient to be looked up (see
// ExtractOptions.LookupPatient). An Observation is an input when one of its
// codings maps to an analyte in the configured code map (hl7v2.CodeMap): the
// system http://loinc.org is looked up as the HL7 v2 coding system "LN",
// any other system as itself, and entries without a system match any.
//
//   - Value: valueQuantity.value as written (a decimal keeps its digits),
//     prefixed by the comparator (<, <=, >, >=), which calc refuses as a
//     censored value; the unit is valueQuantity.code (UCUM), else
//     valueQuantity.unit, else the code map entry's unit. valueString and
//     valueInteger are passed as text.
//   - Collection time: effectiveDateTime, else effectivePeriod.start, else
//     effectiveInstant. Less than day precision leaves it unset, so calc
//     refuses for a missing age rather than guess one.
//   - Patient: birthDate (day precision required, as for collection time)
//     and gender (female, male; anything else is unknown).
//   - Method and instrument for calibration rules: the first code of
//     Observation.method (else its text), and Observation.device's
//     identifier value (else its display).
//   - Status: final, amended, corrected and preliminary are used;
//     cancelled gives no eGFR and a note; entered-in-error withdraws the
//     input (and any eGFR derived from it); registered adds nothing;
//     unknown gives a note.
//
// Inputs are grouped by patient and collection time; each group is one
// calculation. A group without its own height or weight borrows the
// patient's from elsewhere in the request, as the HL7 v2 adapter does.
//
// # Outputs
//
// Each calc.Result becomes an Observation (status final, or preliminary,
// corrected or amended when an input was; category laboratory; the LOINC
// code of the result with text naming the equation; method naming the
// equation; valueQuantity in UCUM, with comparator ">" for a capped value;
// notes with the KDIGO category and each comment; derivedFrom its inputs)
// and a Provenance that targets it. Refusals and notes are issues of one
// OperationOutcome. An entered-in-error input gives, for each eGFR the
// policy can report from it, an Observation with status entered-in-error
// and no value, so that a receiver withdraws the value it holds.
//
// Observation and Provenance ids are derived from the patient identifier,
// the collection time, the equation and the assumed sex (a SHA-256, never
// the values themselves): a resent, corrected or withdrawn result gets the
// id of the eGFR it replaces, and the forwarded transaction updates it in
// place with PUT.
//
// # Identifiers and extensions
//
// filtrate's own codes and extensions use these URIs:
//
//	urn:filtrate:equation           CodeSystem of equation IDs (Coding.version: implementation version)
//	urn:filtrate:policy             CodeSystem of policy names (Coding.version: policy version)
//	urn:filtrate:refusal            CodeSystem of refusal reason codes (calc.Reason)
//	urn:filtrate:audit-record       Identifier system of audit record IDs
//	urn:filtrate:message            Identifier system of forwarded transaction Bundles
//	urn:filtrate:fhir:equation      Provenance extension, valueCoding: the equation
//	urn:filtrate:fhir:policy        Provenance extension, valueCoding: the reporting policy
//	urn:filtrate:fhir:config-hash   Provenance extension, valueString: configuration hash
//	urn:filtrate:fhir:software      Provenance extension, valueString: filtrate's version
//	urn:filtrate:fhir:message-id    Provenance extension, valueString: the audit MessageID
//	urn:filtrate:fhir:audit-record  Provenance extension, valueIdentifier: the audit record ID
//
// The audit record ID is known only after the records are committed, so it
// is in the answer to the sender but not in the forwarded Bundle, which is
// committed together with the records; there, the message ID extension
// names the audit records (store.Filter.MessageID).
package fhir
