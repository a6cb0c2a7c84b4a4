package batch

import (
	"strconv"

	"filtrate/calc"
)

// Header describes the output columns.
type Header struct {
	// Input are the input columns, in canonical order (see Reader.Columns).
	Input []string
	// AssumedSex adds the trailing assumed_sex column.
	AssumedSex bool
}

// Names returns every output column name in order.
func (h Header) Names() []string {
	n := append([]string(nil), h.Input...)
	n = append(n, ColEGFRExact, ColReported, ColUnit, ColCategory, ColSuppressed)
	if h.AssumedSex {
		n = append(n, ColAssumedSex)
	}
	return n
}

// Values returns a row's cells in the order of Names.
func (h Header) Values(r Row) []string {
	v := make([]string, 0, len(h.Input)+6)
	for _, c := range h.Input {
		if c == ColEquation {
			v = append(v, r.Equation)
			continue
		}
		v = append(v, r.Input[c])
	}
	v = append(v, r.Exact, r.Reported, r.Unit, r.Category, string(r.Suppressed))
	if h.AssumedSex {
		v = append(v, r.AssumedSex)
	}
	return v
}

// Row is one output row.
type Row struct {
	Line     int               // input line of the record
	Input    map[string]string // input cells as written, by column
	Equation string            // equation used (or asked for, when refused)
	// Exact is the unrounded value with four decimals; blank when refused.
	Exact      string
	Reported   string
	Unit       string
	Category   string
	Suppressed calc.Reason
	AssumedSex string
	Steps      []calc.Step
	Comments   []string
}

// Evaluator turns records into output rows under one policy. It holds no
// mutable state and is safe for concurrent use.
type Evaluator struct {
	calc   *calc.Calculator
	policy calc.Policy
}

// NewEvaluator returns an Evaluator; c nil means calc.Builtin().
func NewEvaluator(c *calc.Calculator, p calc.Policy) *Evaluator {
	if c == nil {
		c = calc.NewCalculator(calc.Builtin())
	}
	return &Evaluator{calc: c, policy: p}
}

// Header returns the output header for the given input columns.
func (e *Evaluator) Header(input []string) Header {
	return Header{Input: input, AssumedSex: e.policy.SexUnknown == calc.SexRuleBoth}
}

// ExactDecimals is the number of decimals of egfr_exact.
const ExactDecimals = 4

// Evaluate computes one record: one row per reported value, or a single row
// with the reason nothing was reported.
func (e *Evaluator) Evaluate(rec Record) []Row {
	base := Row{Line: rec.Line, Input: rec.Values, Equation: rec.Request.Equation}
	if rec.Problem != "" {
		base.Equation = rec.Values[ColEquation]
		base.Suppressed = rec.Problem
		base.Comments = []string{problemComment(rec.Problem)}
		return []Row{base}
	}
	req := rec.Request
	req.Policy = e.policy
	out := e.calc.Evaluate(req)

	var rows []Row
	for _, r := range out.Results {
		if !r.Primary {
			continue
		}
		row := base
		row.Equation = r.Equation
		row.Exact = strconv.FormatFloat(r.Exact, 'f', ExactDecimals, 64)
		row.Reported = r.Reported
		row.Unit = r.Unit
		row.Category = r.Category
		row.AssumedSex = r.AssumedSex
		row.Steps = append(e.inputSteps(r.Equation, out.Inputs), r.Steps...)
		row.Comments = r.Comments
		rows = append(rows, row)
	}
	if len(rows) > 0 {
		return rows
	}

	if req.Equation == "" {
		base.Equation = intendedEquation(e.policy, req, out)
	}
	base.Suppressed, base.Comments = e.suppression(base.Equation, req, out)
	return []Row{base}
}

// problemComment explains a record that could not become a request.
func problemComment(r calc.Reason) string {
	if r == calc.ReasonAgeMissing {
		return "eGFR not calculated: age_years is not a plain decimal number."
	}
	return r.Describe()
}

// analytesOf lists the inputs an equation computes from (nil, false when the
// equation is unknown).
func (e *Evaluator) analytesOf(id string) (map[calc.Analyte]bool, bool) {
	eq, ok := e.calc.Registry().Latest(id)
	if !ok {
		return nil, false
	}
	a := map[calc.Analyte]bool{}
	n := eq.Needs
	if n.Has(calc.NeedCreatinine) {
		a[calc.Creatinine] = true
	}
	if n.Has(calc.NeedCystatinC) {
		a[calc.CystatinC] = true
	}
	if n.Has(calc.NeedHeight) {
		a[calc.Height] = true
	}
	if n.Has(calc.NeedWeight) {
		a[calc.Weight] = true
	}
	if n.Has(calc.NeedTimedUrine) {
		a[calc.UrineCreatinine] = true
		a[calc.UrineVolume] = true
		a[calc.CollectionTime] = true
	}
	return a, true
}

// inputSteps returns the conversion and calibration steps of the inputs the
// equation used, each named after its input.
func (e *Evaluator) inputSteps(id string, inputs []calc.InputUse) []calc.Step {
	uses, _ := e.analytesOf(id)
	var steps []calc.Step
	for _, in := range inputs {
		if !uses[in.Analyte] {
			continue
		}
		for _, s := range in.Steps {
			s.Name = string(in.Analyte) + ": " + s.Name
			steps = append(steps, s)
		}
	}
	return steps
}

// suppression picks the reason for a refused record (see the package
// documentation) and the plain-language reasons for the comments.
func (e *Evaluator) suppression(id string, req calc.Request, out calc.Outcome) (calc.Reason, []string) {
	uses, known := e.analytesOf(id)
	relevant := func(r calc.Refusal) bool {
		switch {
		case id == "":
			return true
		case r.Equation != "":
			return r.Equation == id
		case r.Analyte == "":
			return true
		default:
			return known && uses[r.Analyte]
		}
	}
	var first calc.Reason
	var comments []string
	seen := map[string]bool{}
	for _, r := range out.Refusals {
		if !relevant(r) {
			continue
		}
		if first == "" {
			first = r.Code
		}
		msg := r.Message
		if msg == "" {
			msg = r.Code.Describe()
		}
		if !seen[msg] {
			seen[msg] = true
			comments = append(comments, msg)
		}
	}
	if first == "" {
		first = calc.ReasonInputMissing
		if req.AgeYears == nil {
			first = calc.ReasonAgeMissing
		}
		comments = []string{first.Describe()}
	}
	return first, comments
}

// intendedEquation returns the equation the policy would have chosen as
// primary for the record's usable inputs, or "" when none applies. It
// mirrors the band choice of calc.Calculator.Evaluate, which does not
// report the primary equation when it refuses it.
//
// An input counts as usable when it is present and calc refused it with no
// equation named. Such a refusal also comes from age checks, but those only
// happen when no equation ran, and then no band applies either.
func intendedEquation(p calc.Policy, req calc.Request, out calc.Outcome) string {
	if out.AgeYears == nil {
		return ""
	}
	age := *out.AgeYears
	usable := func(a calc.Analyte) bool {
		present := false
		for _, m := range req.Measurements {
			present = present || m.Analyte == a
		}
		if !present {
			return false
		}
		for _, r := range out.Refusals {
			if r.Analyte == a && r.Equation == "" {
				return false
			}
		}
		return true
	}
	for _, b := range p.Bands {
		if age < b.MinAge || (b.MaxAge != 0 && age >= b.MaxAge) {
			continue
		}
		cr, cys := usable(calc.Creatinine), usable(calc.CystatinC)
		switch {
		case cr && cys:
			switch {
			case b.PrimaryWhenBoth != "":
				return b.PrimaryWhenBoth
			case b.Combined != "":
				return b.Combined
			default:
				return b.Creatinine
			}
		case cr:
			return b.Creatinine
		case cys:
			return b.CystatinC
		}
		return ""
	}
	return ""
}
