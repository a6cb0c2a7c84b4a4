// Package hl7v2 reads, edits and writes HL7 version 2 messages in the
// traditional "pipe and hat" encoding, builds and reads acknowledgements,
// extracts the inputs of a kidney-function calculation from an ORU^R01 result
// message and writes the computed eGFR back into it.
//
// # Encoding
//
// The delimiters are those the message declares in MSH-1 and MSH-2; they are
// never assumed. Segments may end with carriage return (the standard), line
// feed or both on input; output always ends every segment with a carriage
// return. Blank lines are dropped.
//
// Parsing is lossless: a [Segment] keeps the exact text it was read from and
// [Message.Encode] writes an unchanged segment byte for byte, Z-segments and
// unknown segments included. Field text is kept in its encoded (escaped) form;
// accessors such as [Field.String] and [Component.Sub] decode escape sequences
// (\F\ \S\ \T\ \R\ \E\, \.br\ and \Xhh..\) when a value is read, and
// [Delimiters.EncodeText] encodes them when a value is written.
//
// Positions follow the standard: fields, repetitions, components and
// subcomponents are numbered from 1, and in the MSH segment field 1 is the
// field separator itself and field 2 the encoding characters.
//
// # Patient data
//
// Error values of this package never contain message content: a
// [ParseError] names the segment by position and type and the field by
// position only, so errors can be logged safely.
//
// # Added observations
//
// [ORU.Enrich] writes each eGFR as an OBX whose identity never depends on
// what else the message holds: OBX-3 is the LOINC code of the result and
// OBX-4 (observation sub-ID) is the equation ID, followed by ".F" or ".M"
// when the value is calculated as if female or male because the patient's
// sex is not recorded (see [SubID]; at most 20 characters, the length of
// OBX-4 in v2.5.1, e.g. "ckd-epi-2021-crcys.F"). Several equations share
// one LOINC code (EKFC and CKiD U25 report under the generic 69405-9), and
// with sex unknown a policy may report two values under one code; the
// sub-ID keeps them apart. A corrected result and a withdrawal carry the
// same OBX-3 and OBX-4 as the result they replace or remove, so a receiver
// keyed on OBX-3 + OBX-4 applies them to the right observation. A
// withdrawal ([Withdrawal]) is an OBX with an empty OBX-5 and OBX-11 D, W
// or X, followed by a note saying why; which eGFRs are withdrawn is
// decided by the caller (internal/ingest), not here.
//
// # Scope
//
// hl7v2 translates. It does not decide clinical questions: which equation to
// use, whether a value is plausible or whether an eGFR may be reported is
// decided by package calc; hl7v2 only carries the decision into the message.
package hl7v2
