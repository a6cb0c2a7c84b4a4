package store

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"strconv"
	"time"
)

// canonicalVersion starts every canonical encoding; a future change of the
// encoding gets a new version line.
const canonicalVersion = "filtrate-audit-v1\n"

// canonicalTimeLayout is the layout of times in the canonical encoding: UTC,
// RFC 3339 with all nine fractional digits.
const canonicalTimeLayout = "2006-01-02T15:04:05.000000000Z"

// Canonical returns the canonical encoding of r that ContentHash covers:
// every field except ContentHash.
//
// The encoding is the line "filtrate-audit-v1\n" followed, for each field in
// the order below, by
//
//	NAME "=" LEN ":" VALUE "\n"
//
// where NAME is the field's snake_case name, VALUE its text and LEN the
// decimal byte length of VALUE, so that no value can be mistaken for a
// delimiter. The fields, in order: id, recorded_at, transport, message_id,
// dedup_key, raw_hash, patient_id, birth_date, sex, collected_at, inputs,
// equation, equation_version, steps, exact, reported, unit, category,
// comments, suppression_code, suppression_text, policy, policy_version,
// config_hash, software_version, output_message_id, request, prev_hash.
//
// Values: id in decimal; times in UTC as 2006-01-02T15:04:05.000000000Z
// (always nine fractional digits), the empty string for a zero time; JSON
// fields (inputs, steps, request) byte for byte as stored, empty when
// absent; exact as the shortest decimal that round-trips a float64
// (strconv 'g', -1), empty when nil; comments as a JSON array of strings
// (encoding/json, [] when there are none); every other field as its text.
func Canonical(r AuditRecord) []byte {
	comments := r.Comments
	if comments == nil {
		comments = []string{}
	}
	commentsJSON, err := json.Marshal(comments)
	if err != nil {
		// json.Marshal of a []string cannot fail.
		panic(fmt.Sprintf("store: encoding comments: %v", err))
	}
	exact := ""
	if r.Exact != nil {
		exact = strconv.FormatFloat(*r.Exact, 'g', -1, 64)
	}
	fields := [...]struct {
		name, value string
	}{
		{"id", strconv.FormatInt(r.ID, 10)},
		{"recorded_at", canonicalTime(r.RecordedAt)},
		{"transport", r.Transport},
		{"message_id", r.MessageID},
		{"dedup_key", r.DedupKey},
		{"raw_hash", r.RawHash},
		{"patient_id", r.PatientID},
		{"birth_date", r.BirthDate},
		{"sex", r.Sex},
		{"collected_at", canonicalTime(r.CollectedAt)},
		{"inputs", string(r.Inputs)},
		{"equation", r.Equation},
		{"equation_version", r.EquationVersion},
		{"steps", string(r.Steps)},
		{"exact", exact},
		{"reported", r.Reported},
		{"unit", r.Unit},
		{"category", r.Category},
		{"comments", string(commentsJSON)},
		{"suppression_code", r.SuppressionCode},
		{"suppression_text", r.SuppressionText},
		{"policy", r.Policy},
		{"policy_version", r.PolicyVersion},
		{"config_hash", r.ConfigHash},
		{"software_version", r.SoftwareVersion},
		{"output_message_id", r.OutputMessageID},
		{"request", string(r.Request)},
		{"prev_hash", r.PrevHash},
	}
	n := len(canonicalVersion)
	for _, f := range fields {
		n += len(f.name) + len(f.value) + 24
	}
	b := make([]byte, 0, n)
	b = append(b, canonicalVersion...)
	for _, f := range fields {
		b = append(b, f.name...)
		b = append(b, '=')
		b = strconv.AppendInt(b, int64(len(f.value)), 10)
		b = append(b, ':')
		b = append(b, f.value...)
		b = append(b, '\n')
	}
	return b
}

func canonicalTime(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format(canonicalTimeLayout)
}

// HashRecord returns the hex SHA-256 of Canonical(r): the value ContentHash
// must hold.
func HashRecord(r AuditRecord) string {
	sum := sha256.Sum256(Canonical(r))
	return hex.EncodeToString(sum[:])
}

// ProblemKind classifies a chain verification finding.
type ProblemKind string

// Kinds of chain problems.
const (
	// ProblemContentHash: the stored ContentHash differs from the hash of
	// the record's fields, so the record was altered.
	ProblemContentHash ProblemKind = "content-hash-mismatch"
	// ProblemBrokenLink: PrevHash differs from the ContentHash of the
	// record before it.
	ProblemBrokenLink ProblemKind = "broken-link"
	// ProblemGap: records with the IDs ID..LastID are missing (removed).
	ProblemGap ProblemKind = "gap"
	// ProblemOrder: a record's ID does not follow the previous one (a
	// repeated or out-of-order ID).
	ProblemOrder ProblemKind = "out-of-order"
	// ProblemHead: the chain ends before, or differs from, the head the
	// store tracks (records removed from the end, or the head altered).
	ProblemHead ProblemKind = "head-mismatch"
)

// Problem is one finding of chain verification. It carries record IDs only,
// never record content.
type Problem struct {
	// Kind classifies the finding.
	Kind ProblemKind
	// ID is the record concerned (the first missing ID for a gap).
	ID int64
	// LastID is the last missing ID for a gap or a head mismatch, and equals
	// ID otherwise.
	LastID int64
}

// String describes the problem, for example "record 7: gap" or
// "records 7-9: gap".
func (p Problem) String() string {
	if p.LastID != p.ID {
		return fmt.Sprintf("records %d-%d: %s", p.ID, p.LastID, p.Kind)
	}
	return fmt.Sprintf("record %d: %s", p.ID, p.Kind)
}

// Verifier checks an audit chain fed to it record by record in chain order
// (as Store.Walk delivers it). It is pure: no I/O, no clock. The zero value
// is not ready; use NewVerifier or ResumeVerifier.
type Verifier struct {
	next     int64
	prevHash string
	checked  int64
	problems []Problem
}

// NewVerifier returns a Verifier for a chain starting at record 1.
func NewVerifier() *Verifier {
	return &Verifier{next: 1, prevHash: GenesisHash}
}

// ResumeVerifier returns a Verifier for a chain section that follows the
// record lastID whose ContentHash is lastHash (for example from an earlier,
// trusted verification).
func ResumeVerifier(lastID int64, lastHash string) *Verifier {
	return &Verifier{next: lastID + 1, prevHash: lastHash}
}

// Add checks the next record and returns the number of problems it found.
func (v *Verifier) Add(r AuditRecord) int {
	before := len(v.problems)
	v.checked++
	if r.ID < v.next {
		v.problems = append(v.problems, Problem{Kind: ProblemOrder, ID: r.ID, LastID: r.ID})
		return len(v.problems) - before
	}
	gap := r.ID > v.next
	if gap {
		v.problems = append(v.problems, Problem{Kind: ProblemGap, ID: v.next, LastID: r.ID - 1})
	}
	if HashRecord(r) != r.ContentHash {
		v.problems = append(v.problems, Problem{Kind: ProblemContentHash, ID: r.ID, LastID: r.ID})
	}
	// After a gap the predecessor is unknown, so the link cannot be judged;
	// the gap itself is the finding.
	if !gap && r.PrevHash != v.prevHash {
		v.problems = append(v.problems, Problem{Kind: ProblemBrokenLink, ID: r.ID, LastID: r.ID})
	}
	v.next = r.ID + 1
	v.prevHash = r.ContentHash
	return len(v.problems) - before
}

// CheckHead compares the end of the records fed so far with the head the
// store tracks, which reveals records removed from the end of the chain.
// Call it after the last Add.
func (v *Verifier) CheckHead(h ChainHead) {
	last := v.next - 1
	switch {
	case h.LastID > last:
		v.problems = append(v.problems, Problem{Kind: ProblemHead, ID: last + 1, LastID: h.LastID})
	case h.LastID < last || h.LastHash != v.prevHash:
		v.problems = append(v.problems, Problem{Kind: ProblemHead, ID: h.LastID, LastID: h.LastID})
	}
}

// Checked returns how many records were fed.
func (v *Verifier) Checked() int64 { return v.checked }

// Problems returns the problems found so far, in the order found.
func (v *Verifier) Problems() []Problem {
	return append([]Problem(nil), v.problems...)
}

// OK reports whether no problem was found.
func (v *Verifier) OK() bool { return len(v.problems) == 0 }

// VerifyChain checks records that form a chain from record 1, in order, and
// returns every problem found (nil when the chain is intact).
func VerifyChain(records []AuditRecord) []Problem {
	v := NewVerifier()
	for _, r := range records {
		v.Add(r)
	}
	return v.Problems()
}

// normalizeFloat maps -0 to 0, which both backends store alike.
func normalizeFloat(f float64) float64 {
	if f == 0 {
		return 0
	}
	return f
}

func finite(f float64) bool { return !math.IsNaN(f) && !math.IsInf(f, 0) }
