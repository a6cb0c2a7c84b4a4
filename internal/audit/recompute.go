package audit

import (
	"encoding/json"
	"fmt"
	"math"
	"strconv"
	"strings"

	"filtrate/calc"
	"filtrate/internal/pipeline"
	"filtrate/store"
)

// assumedSexPrefix starts the first comment of a result computed under an
// assumed sex (pipeline.Records writes "assumed sex: female" or "...male").
const assumedSexPrefix = "assumed sex: "

// Outcome is the result of recomputing one record.
type Outcome string

// Outcomes of a recomputation.
const (
	// Match: the recomputation reproduced the record.
	Match Outcome = "match"
	// Mismatch: the recomputation ran and differs from the record; see
	// Verdict.Differences.
	Mismatch Outcome = "mismatch"
	// NotApplicable: the record holds nothing to recompute (an input
	// withdrawn by its status).
	NotApplicable Outcome = "not-applicable"
	// Failed: the record cannot be recomputed (no stored request, or an
	// equation version this build does not know); see Verdict.Reason.
	Failed Outcome = "failed"
)

// Difference is one field where a recomputation differs from the record.
type Difference struct {
	// Field names what differs: "exact", "reported", "category", "unit",
	// "equation_version", "steps", "inputs", "result" (no matching result)
	// or "refusal" (the refusal did not reappear).
	Field string
	// Stored and Recomputed hold the two values as text. They may be
	// clinical values: only [Render] shows them.
	Stored, Recomputed string
	// Detail describes the difference without patient data, for example
	// "recomputed − stored = +1.4210854715202004e-14 (1 ulp)".
	Detail string
}

// Verdict is what recomputing one record found.
type Verdict struct {
	Outcome Outcome
	// Compared says what was compared: "result" (a computed value) or
	// "refusal" (a suppression code); empty when nothing was.
	Compared string
	// Equation, EquationVersion and EquationName identify the
	// implementation the record was recomputed with (empty when none
	// applies). EquationName is empty when this build does not know the
	// version.
	Equation, EquationVersion, EquationName string
	// AgeYears and AgeBasis are the age the recomputation used, when one
	// could be derived.
	AgeYears *float64
	AgeBasis string
	// Differences lists what differs when Outcome is Mismatch.
	Differences []Difference
	// Reason says why, when Outcome is Failed or NotApplicable. It never
	// holds patient data.
	Reason string
}

// Summary describes the verdict in one line without patient data: the
// outcome, the fields that differ and their value-free details. It suits
// verification reports and logs.
func (v Verdict) Summary() string {
	switch v.Outcome {
	case Match:
		if v.Compared == "refusal" {
			return "match: the refusal recurs"
		}
		return fmt.Sprintf("match: %s version %s gives the identical value, text, category, steps and inputs", v.Equation, v.EquationVersion)
	case Mismatch:
		parts := make([]string, 0, len(v.Differences))
		for _, d := range v.Differences {
			if d.Detail != "" {
				parts = append(parts, d.Field+": "+d.Detail)
			} else {
				parts = append(parts, d.Field+" differs")
			}
		}
		return "mismatch: " + strings.Join(parts, "; ")
	default:
		if v.Reason != "" {
			return string(v.Outcome) + ": " + v.Reason
		}
		return string(v.Outcome)
	}
}

// String describes the verdict in one line including the differing values.
// It may hold clinical values: use it only where patient data may be shown
// (the "audit show" view), and Summary elsewhere.
func (v Verdict) String() string {
	if v.Outcome != Mismatch {
		return v.Summary()
	}
	parts := make([]string, 0, len(v.Differences))
	for _, d := range v.Differences {
		s := fmt.Sprintf("%s stored %q, recomputed %q", d.Field, d.Stored, d.Recomputed)
		if d.Detail != "" {
			s += " (" + d.Detail + ")"
		}
		parts = append(parts, s)
	}
	return "mismatch: " + strings.Join(parts, "; ")
}

// Recomputer recomputes audit records with one calculator. It is safe for
// concurrent use.
type Recomputer struct {
	calc *calc.Calculator
}

// NewRecomputer returns a Recomputer over c; nil means
// calc.NewCalculator(calc.Builtin()), the calculator the daemon runs. Tests
// and migrations inject a calculator whose registry holds other equation
// versions.
func NewRecomputer(c *calc.Calculator) *Recomputer {
	if c == nil {
		c = calc.NewCalculator(calc.Builtin())
	}
	return &Recomputer{calc: c}
}

// Recompute recomputes rec with the builtin calculator; see
// [Recomputer.Recompute].
func Recompute(rec store.AuditRecord) (Verdict, error) {
	return NewRecomputer(nil).Recompute(rec)
}

// Recompute evaluates the calculation request stored in rec again, with the
// equation version the record names pinned (Request.Pin), and compares the
// outcome with the record:
//
//   - a result record (Exact set): the result of the same equation (and,
//     when the record's first comment says "assumed sex: ...", the same
//     assumed sex) must have the same equation version, the bitwise-equal
//     unrounded value, the same reported text, unit and category, the same
//     worked steps; and every input must be used as recorded;
//   - a refusal record: a refusal with the same code (and equation, when the
//     record names one) must reappear;
//   - a record of a withdrawn input: nothing is recomputed (NotApplicable).
//
// Exact equality is the right test. calc is a pure function of the request:
// no clock, no I/O, no randomness. The stored request round-trips exactly
// (encoding/json writes a float64 as the shortest decimal that parses back
// to the same bits, and the store keeps the unrounded value as a float64),
// and the same IEEE 754 operations in the same order give the same bits.
// So on the build that made the record any difference, however small, means
// that the request, the implementation or the record changed. Across builds
// for different processors the Go specification allows fusing x*y+z into
// one rounding (FMA), and some math functions have per-architecture
// assembly, so a record may legitimately recompute a unit in the last place
// differently there; the Difference then gives the distance in ulps (with
// equal reported text and category), for a person to judge.
//
// Recompute returns an error, together with a Verdict whose Outcome is
// Failed and whose Reason repeats it, when the record cannot be recomputed.
// Neither holds patient data.
func (rc *Recomputer) Recompute(rec store.AuditRecord) (Verdict, error) {
	if rec.SuppressionCode == pipeline.ReasonWithdrawn {
		return Verdict{Outcome: NotApplicable, Reason: "input withdrawn: nothing to recompute"}, nil
	}
	if rec.SuppressionCode == pipeline.ReasonEGFRWithdrawn {
		return Verdict{Outcome: NotApplicable, Reason: "eGFR withdrawn: nothing to recompute"}, nil
	}
	fail := func(format string, args ...any) (Verdict, error) {
		v := Verdict{Outcome: Failed, Equation: rec.Equation, EquationVersion: rec.EquationVersion, Reason: fmt.Sprintf(format, args...)}
		return v, fmt.Errorf("audit: record %d: %s", rec.ID, v.Reason)
	}
	if len(rec.Request) == 0 {
		return fail("no calculation request stored")
	}
	var req calc.Request
	if err := json.Unmarshal(rec.Request, &req); err != nil {
		// The JSON error may quote part of the request: do not keep it.
		return fail("the stored calculation request does not decode")
	}
	reg := rc.calc.Registry()
	v := Verdict{Equation: rec.Equation, EquationVersion: rec.EquationVersion}
	if rec.Equation != "" && rec.EquationVersion != "" {
		eq, ok := reg.Get(rec.Equation, rec.EquationVersion)
		if !ok {
			return fail("equation %s version %s is not in this build", rec.Equation, rec.EquationVersion)
		}
		v.EquationName = eq.Name
		pin := make(map[string]string, len(req.Pin)+1)
		for k, val := range req.Pin {
			pin[k] = val
		}
		pin[rec.Equation] = rec.EquationVersion
		req.Pin = pin
	} else if rec.Equation != "" {
		// Refusal records carry no version: the request's own pin, or the
		// latest version, decides.
		if ver, ok := req.Pin[rec.Equation]; ok {
			v.EquationVersion = ver
		} else if eq, ok := reg.Latest(rec.Equation); ok {
			v.EquationVersion = eq.Version
		}
		if eq, ok := reg.Get(rec.Equation, v.EquationVersion); ok {
			v.EquationName = eq.Name
		}
	}

	out := rc.calc.Evaluate(req)
	v.AgeYears, v.AgeBasis = out.AgeYears, out.AgeBasis

	switch {
	case rec.Exact != nil:
		v.Compared = "result"
		v.Differences = compareResult(rec, out)
	case rec.SuppressionCode != "":
		v.Compared = "refusal"
		v.Differences = compareRefusal(rec, out)
	default:
		return fail("the record holds neither a value nor a suppression code")
	}
	v.Differences = append(v.Differences, compareInputs(rec, out)...)
	v.Outcome = Match
	if len(v.Differences) > 0 {
		v.Outcome = Mismatch
	}
	return v, nil
}

// assumedSex returns the sex a result record was computed as, from its
// first comment, or "".
func assumedSex(rec store.AuditRecord) string {
	if len(rec.Comments) > 0 {
		if s, ok := strings.CutPrefix(rec.Comments[0], assumedSexPrefix); ok {
			return s
		}
	}
	return ""
}

func compareResult(rec store.AuditRecord, out calc.Outcome) []Difference {
	sex := assumedSex(rec)
	var res *calc.Result
	for i := range out.Results {
		if r := &out.Results[i]; r.Equation == rec.Equation && r.AssumedSex == sex {
			res = r
			break
		}
	}
	if res == nil {
		d := Difference{Field: "result", Stored: rec.Reported, Recomputed: "no result",
			Detail: "the recomputation produced no result for this equation"}
		for _, r := range out.Refusals {
			if r.Equation == rec.Equation || r.Equation == "" {
				d.Recomputed = "refused: " + string(r.Code)
				d.Detail = "the recomputation refused with " + string(r.Code)
				break
			}
		}
		return []Difference{d}
	}
	var diffs []Difference
	text := func(field, stored, recomputed string) {
		if stored != recomputed {
			diffs = append(diffs, Difference{Field: field, Stored: stored, Recomputed: recomputed})
		}
	}
	text("equation_version", rec.EquationVersion, res.EquationVersion)
	if stored := *rec.Exact; math.Float64bits(stored) != math.Float64bits(res.Exact) {
		diffs = append(diffs, Difference{
			Field: "exact", Stored: formatExact(stored), Recomputed: formatExact(res.Exact),
			Detail: exactDetail(stored, res.Exact),
		})
	}
	text("reported", rec.Reported, res.Reported)
	text("unit", rec.Unit, res.Unit)
	text("category", rec.Category, res.Category)
	if d, ok := compareSteps(rec.Steps, res.Steps); !ok {
		diffs = append(diffs, d)
	}
	return diffs
}

// exactDetail describes the difference of two float64 values without the
// values themselves.
func exactDetail(stored, recomputed float64) string {
	s := fmt.Sprintf("recomputed − stored = %+g", recomputed-stored)
	if u, ok := ulps(stored, recomputed); ok {
		s += fmt.Sprintf(" (%d ulp)", u)
	}
	return s
}

// ulps returns the distance of a and b in units in the last place, when
// both are finite and of the same sign.
func ulps(a, b float64) (uint64, bool) {
	if math.IsNaN(a) || math.IsNaN(b) || math.IsInf(a, 0) || math.IsInf(b, 0) || math.Signbit(a) != math.Signbit(b) {
		return 0, false
	}
	x, y := math.Float64bits(math.Abs(a)), math.Float64bits(math.Abs(b))
	if x > y {
		return x - y, true
	}
	return y - x, true
}

// formatExact writes a float64 as the shortest decimal that round-trips.
func formatExact(f float64) string { return strconv.FormatFloat(f, 'g', -1, 64) }

func compareSteps(stored json.RawMessage, recomputed []calc.Step) (Difference, bool) {
	var steps []calc.Step
	if len(stored) > 0 {
		if err := json.Unmarshal(stored, &steps); err != nil {
			return Difference{Field: "steps", Stored: "undecodable", Recomputed: fmt.Sprintf("%d steps", len(recomputed)),
				Detail: "the stored steps do not decode"}, false
		}
	}
	if len(steps) != len(recomputed) {
		return Difference{Field: "steps", Stored: fmt.Sprintf("%d steps", len(steps)), Recomputed: fmt.Sprintf("%d steps", len(recomputed)),
			Detail: fmt.Sprintf("%d steps stored, %d recomputed", len(steps), len(recomputed))}, false
	}
	for i, s := range steps {
		r := recomputed[i]
		if s.Name != r.Name || s.Formula != r.Formula || math.Float64bits(s.Value) != math.Float64bits(r.Value) {
			return Difference{Field: "steps", Stored: stepText(s), Recomputed: stepText(r),
				Detail: fmt.Sprintf("step %d (%s) differs", i+1, r.Name)}, false
		}
	}
	return Difference{}, true
}

func stepText(s calc.Step) string {
	return fmt.Sprintf("%s = %s (%s)", s.Name, formatExact(s.Value), s.Formula)
}

func compareRefusal(rec store.AuditRecord, out calc.Outcome) []Difference {
	for _, r := range out.Refusals {
		if string(r.Code) == rec.SuppressionCode && (rec.Equation == "" || r.Equation == rec.Equation) {
			return nil
		}
	}
	got := make([]string, 0, len(out.Refusals)+len(out.Results))
	for _, r := range out.Refusals {
		got = append(got, string(r.Code))
	}
	for _, r := range out.Results {
		got = append(got, "result "+r.Equation)
	}
	return []Difference{{
		Field: "refusal", Stored: rec.SuppressionCode, Recomputed: strings.Join(got, ", "),
		Detail: "refusal " + rec.SuppressionCode + " does not reappear",
	}}
}

// compareInputs checks that every input is used as recorded: same used
// value (bitwise), unit, calibration rule and acceptance.
func compareInputs(rec store.AuditRecord, out calc.Outcome) []Difference {
	if len(rec.Inputs) == 0 {
		return nil
	}
	var stored []calc.InputUse
	if err := json.Unmarshal(rec.Inputs, &stored); err != nil {
		return []Difference{{Field: "inputs", Stored: "undecodable", Detail: "the stored inputs do not decode"}}
	}
	if len(stored) != len(out.Inputs) {
		return []Difference{{Field: "inputs", Stored: fmt.Sprintf("%d inputs", len(stored)), Recomputed: fmt.Sprintf("%d inputs", len(out.Inputs)),
			Detail: fmt.Sprintf("%d inputs stored, %d recomputed", len(stored), len(out.Inputs))}}
	}
	var diffs []Difference
	for i, s := range stored {
		r := out.Inputs[i]
		if s.Analyte == r.Analyte && math.Float64bits(s.Used) == math.Float64bits(r.Used) && s.UsedUnit == r.UsedUnit &&
			s.Calibration == r.Calibration && s.CalibrationV == r.CalibrationV && s.Accepted == r.Accepted {
			continue
		}
		diffs = append(diffs, Difference{
			Field: "inputs", Stored: inputUsedText(s), Recomputed: inputUsedText(r),
			Detail: fmt.Sprintf("input %d (%s) is used differently", i+1, r.Analyte),
		})
	}
	return diffs
}

func inputUsedText(u calc.InputUse) string {
	s := fmt.Sprintf("%s %s %s", u.Analyte, formatExact(u.Used), u.UsedUnit)
	if u.Calibration != "" {
		s += fmt.Sprintf(" (calibration %s v%s)", u.Calibration, u.CalibrationV)
	}
	if !u.Accepted {
		s += " not used"
	}
	return s
}
