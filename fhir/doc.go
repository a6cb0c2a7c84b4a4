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
//     effectiveInstant, converted to the laboratory's time zone
//     (ExtractOptions.Location), whose calendar date gives the age; a date
//     without a time is that date there. Less than day precision leaves it
//     unset, so calc refuses for a missing age rather than guess one.
//   - Patient: an identifier with system and value is required (see
//     Identity below; of several, the lexicographically smallest
//     system|value is used, whatever their order); birthDate (day
//     precision required, as for collection time) and gender (female,
//     male; anything else is unknown).
//   - Method and instrument for calibration rules: the first code of
//     Observation.method (else its text), and Observation.device's
//     identifier value (else its display).
//   - Status: final, amended, corrected and preliminary are used;
//     cancelled gives no eGFR and a note; entered-in-error gives a note;
//     both join their group so that the caller can withdraw the eGFRs
//     derived from them (a height or weight in these statuses too, without
//     a note); registered adds nothing; unknown gives a note.
//
// Inputs are grouped by patient and collection time; each group is one
// calculation. A group without its own height or weight borrows the
// patient's from elsewhere in the request, as the HL7 v2 adapter does.
//
// # Outputs
//
// Each calc.Result becomes an Observation (status final, or preliminary,
// corrected or amended when an input was, counting every input it was
// calculated from, height and weight included (calc.Result.Inputs); category
// laboratory; the LOINC code of the result with text naming the equation;
// method naming the equation; valueQuantity in UCUM, with comparator ">"
// for a capped value; notes with the KDIGO category and each comment;
// derivedFrom those same inputs) and a Provenance that targets it.
// Refusals and notes are issues of one OperationOutcome. Each Withdrawal
// of a GroupResult (decided by the caller, internal/ingest, never here)
// becomes an Observation with status entered-in-error or cancelled (FHIR
// R4 ObservationStatus), no value, the code and method of the eGFR it
// withdraws, and a note saying why, so that a receiver withdraws the value
// it holds.
//
// # Identity
//
// Observation and Provenance ids are derived from the patient identifier
// (Patient.identifier as system|value), the collection time (in UTC), the
// equation, the assumed sex and the identities of the measured inputs the
// equation uses (creatinine, cystatin C, urine creatinine), for results
// and withdrawals alike (a SHA-256, never the values themselves): a
// resent, corrected or withdrawn result gets the id of the eGFR it
// replaces, and the forwarded transaction updates it in place with PUT,
// while two specimens of one patient with the same collection time (a
// date without a time) get different ids. Only a real identifier keys the
// patient: a logical id or a reference is local to one request or server,
// and two patients sharing one ("#pat") would share ids. An input whose
// Patient has no identifier with system and value is refused with 422 and
// an OperationOutcome naming Patient.identifier.
//
// An input Observation's identity is its identifier (of those with system
// and value, the lexicographically smallest system|value), else its
// logical id, else its entry's fullUrl; a corrected or entered-in-error
// version keeps it. Height and weight are not part of it: an eGFR
// recalculated with a corrected or another height is the same eGFR and
// replaces the one sent. Limitations: an Observation with none of the
// three adds nothing to the id (two such specimens at the same time share
// ids, as before), and a fullUrl that the sender does not keep across
// resends (a fresh urn:uuid) gives a new id each time. A withdrawal finds
// the identities of the eGFR's other inputs in its group; when the request
// does not hold one (a combined creatinine–cystatin C eGFR withdrawn for a
// cystatin C sent alone), the withdrawal's id derives from patient,
// collection time, equation and assumed sex alone, and does not address
// the eGFR it means to withdraw.
//
// The forwarded transaction sends each Patient and Observation of the
// request that has no logical id but an identifier with system and value,
// and that the sender POSTed or sent without a request, as a conditional
// update (PUT [type]?identifier=[system]|[value]), so that a corrected or
// entered-in-error version replaces the one held downstream; one with
// neither goes as a plain POST, which a redelivery could duplicate; see
// Codec.Forward.
//
// A request is recognised as resent (Request.DedupKey) by its
// Bundle.identifier together with the SHA-256 of its body: the identical
// bytes sent again change nothing, while different content under a reused
// identifier is processed as a new message rather than dropped.
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
