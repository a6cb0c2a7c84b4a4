// Package audit is the auditor's view of filtrate's audit trail: it
// verifies the hash chain and recomputes every record ([Verify]), recomputes
// one record ([Recomputer.Recompute]), renders a record as a person reads it
// ([Render]) and exports records as CSV or as FHIR R4 Provenance and
// AuditEvent resources ([NewCSVWriter], [NewFHIRWriter], [Export]).
//
// The commands "filtrate audit search|show|verify|export" are thin wrappers
// around this package.
//
// # Patient data
//
// [Render] is the one function that displays patient data (identifier, date
// of birth, sex, values). Everything else keeps it out of logs and error
// strings: verification findings ([Problem], [Verdict.Summary]) name record
// IDs, field names and numeric differences, never received values. The
// search and CSV outputs carry the patient identifier (the key an auditor
// searches by) but not the date of birth or sex; the FHIR export carries no
// patient data at all (see [NewFHIRWriter]).
//
// # Recomputation
//
// A record is recomputed from the calculation request stored in it, with
// the equation version the record names pinned, by the same pure function
// (calc.Calculator.Evaluate) that produced it. The unrounded value is
// compared bit for bit: see [Recomputer.Recompute] for why exact equality is
// the right test and what a difference means.
package audit
