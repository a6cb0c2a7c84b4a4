// Package batch runs a laboratory's eGFR verification worksheet: a CSV file
// of invented or de-identified cases goes in, and every case comes out with
// the equation used, the unrounded and reported values, the KDIGO category,
// or the reason no value was reported.
//
// # Input
//
// The first record is a header. Columns may come in any order and any cell
// may be blank. The known columns are
//
//	id, age_years, sex, creatinine, creatinine_unit, cystatin_c,
//	cystatin_c_unit, height, height_unit, weight, weight_unit, equation
//
// and, for a measured creatinine clearance from a timed urine collection,
// the optional extension columns
//
//	urine_creatinine, urine_creatinine_unit, urine_volume,
//	urine_volume_unit, collection_hours
//
// Header names are compared after trimming blanks and folding case, and a
// UTF-8 byte order mark before the first name is ignored (spreadsheets write
// one). An unknown or repeated column is an error naming it; the id and
// age_years columns are required. A malformed file (a record with the wrong
// number of fields, a bare or unterminated quote) is an error naming the
// line; it stops the batch because nothing after it can be trusted.
//
// Each record becomes one [calc.Request]:
//
//   - age_years is used as stated, decimals included. Text that is not a
//     plain decimal number (including censored forms such as "<1") cannot
//     make a request; the record is reported with reason age-missing.
//   - sex goes through [calc.ParseSex]; anything but female or male is
//     unknown and the policy's sex rule applies.
//   - every non-blank value becomes a [calc.Measurement] with the value text
//     exactly as written and the unit exactly as written. A blank unit is
//     passed on blank, never guessed, and calc refuses it (unit-unknown).
//     A unit without a value is ignored: the value is absent.
//     collection_hours becomes a collection-time measurement in "h".
//   - equation blank lets the policy choose, and only the policy's primary
//     result is written; an explicit equation ID runs that equation alone
//     (calc still refuses it when its inputs or age range do not allow it).
//
// A bad record never stops the batch: it is written with its reason.
//
// # Output
//
// One row per reported value, or one row per refused record. The columns
// are the input columns with their values as written, in the canonical order
// above (each extension column only when the input has it), with equation
// replaced by the equation actually used, followed by
//
//	egfr_exact, reported, unit, category, suppressed
//
// egfr_exact is the unrounded value with four decimals (blank when refused);
// reported is the text a report would show ("68", ">90"); unit is the UCUM
// unit; category is the KDIGO category of an indexed value; suppressed is a
// [calc.Reason] code, blank when a value was reported.
//
// When a value is refused, equation holds the equation that was asked for:
// the explicit one, or the one the policy would have chosen as primary for
// the usable inputs (blank when no equation applies, for example when age is
// missing or outside every band of the policy).
//
// Choice for more than one refusal: suppressed holds the first relevant
// refusal in calc's order. calc lists the refusals of individual inputs (in
// input order) before those of equations, so a root cause (height in an
// unknown unit) is preferred over its consequence (height-missing for CKiD
// U25). A refusal is relevant when it names the equation shown, or names no
// equation and concerns an input that equation needs (or no input); when no
// equation is shown, every refusal is relevant. A problem with an input the
// equation does not use (a weight in an unknown unit beside a creatinine-only
// equation) never suppresses the row. When calc gives no reason at all (no
// creatinine or cystatin C in the record), suppressed is input-missing, or
// age-missing when the age is blank.
//
// Choice for unknown sex: when the policy's sex rule is "both", the output
// has a trailing column assumed_sex, and a record of unknown sex yields one
// row per assumed sex ("female", then "male"); the column is blank on every
// other row. The column is decided from the policy, not from the rows, so
// that the header can be written before the first record is read and the
// file streamed; with the rule "refuse" the column never appears.
//
// The JSON form is an array of objects with the same keys, all values as the
// same text as in the CSV form, plus "steps" (unit conversion and
// calibration of the inputs the equation used, then every intermediate term
// of the equation, so the arithmetic can be redone) and "comments" (the
// report comments of a reported value, or the plain-language reasons of a
// refused one).
//
// Records are read, evaluated and written one at a time; the file is never
// held in memory.
package batch
