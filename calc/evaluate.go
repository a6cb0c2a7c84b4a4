package calc

import (
	"errors"
	"fmt"
	"math"
	"strconv"
)

// Calculator evaluates requests against a registry of equations. It holds no
// mutable state and is safe for concurrent use.
type Calculator struct {
	reg *Registry
}

// NewCalculator returns a Calculator over reg (use Builtin()).
func NewCalculator(reg *Registry) *Calculator { return &Calculator{reg: reg} }

// Registry returns the calculator's registry.
func (c *Calculator) Registry() *Registry { return c.reg }

// usable is one input after parsing, conversion, calibration and checks.
type usable struct {
	value float64
	ok    bool
}

// Evaluate computes every result the request and its policy call for, and a
// refusal for everything that could not be computed. It never fails: a
// problem with the inputs is a refusal in the Outcome.
//
// pin optionally fixes equation versions (ID → version) so that a stored
// request recomputes with the implementation that produced it.
func (c *Calculator) Evaluate(req Request) Outcome {
	p := req.Policy
	out := Outcome{Policy: p.Name, PolicyVersion: p.Version, Inputs: []InputUse{}, Results: []Result{}, Refusals: []Refusal{}}

	// Age at collection.
	var age float64
	ageOK := false
	switch {
	case req.AgeYears != nil:
		if a := *req.AgeYears; a >= 0 && a < 150 && !math.IsNaN(a) {
			age, ageOK = a, true
			out.AgeBasis = "stated"
		}
	default:
		if a, ok := AgeAt(req.BirthDate, req.CollectedAt); ok && a.Completed < 150 {
			ageOK = true
			if float64(a.Completed) < p.DecimalAgeBelow {
				age, out.AgeBasis = a.Decimal, "decimal years from date of birth and collection date"
			} else {
				age, out.AgeBasis = float64(a.Completed), "completed years from date of birth and collection date"
			}
		}
	}
	if ageOK {
		out.AgeYears = &age
	}

	// Inputs.
	in := Inputs{AgeYears: age, Sex: req.Sex}
	vals := map[Analyte]*usable{}
	seen := map[Analyte]int{}
	for _, m := range req.Measurements {
		seen[m.Analyte]++
	}
	for _, m := range req.Measurements {
		use, v, reason := c.prepare(req, m)
		if seen[m.Analyte] > 1 {
			reason = ReasonInputDuplicate
		}
		out.Inputs = append(out.Inputs, use)
		if reason != "" {
			out.Refusals = append(out.Refusals, Refusal{Code: reason, Message: reason.Describe(), Analyte: m.Analyte, SourceID: m.SourceID})
			vals[m.Analyte] = &usable{}
			continue
		}
		out.Inputs[len(out.Inputs)-1].Accepted = true
		vals[m.Analyte] = &usable{value: v, ok: true}
	}
	get := func(a Analyte) float64 {
		if u := vals[a]; u != nil && u.ok {
			return u.value
		}
		return 0
	}
	in.CreatinineMgDL = get(Creatinine)
	in.CystatinCMgL = get(CystatinC)
	in.HeightCM = get(Height)
	in.WeightKG = get(Weight)
	in.UrineCreatinineMgDL = get(UrineCreatinine)
	in.UrineVolumeML = get(UrineVolume)
	in.CollectionMin = get(CollectionTime)
	crOK, cysOK := in.CreatinineMgDL > 0, in.CystatinCMgL > 0

	refuseAnalytes := func(code Reason, eq string, analytes ...Analyte) {
		for _, a := range analytes {
			for _, m := range req.Measurements {
				if m.Analyte == a {
					out.Refusals = append(out.Refusals, Refusal{Code: code, Message: code.Describe(), Equation: eq, Analyte: a, SourceID: m.SourceID})
				}
			}
		}
	}

	// Which equations.
	type job struct {
		id       string
		primary  bool
		explicit bool
	}
	var jobs []job
	switch {
	case req.Equation != "":
		jobs = []job{{id: req.Equation, primary: true, explicit: true}}
	case !ageOK:
		refuseAnalytes(ReasonAgeMissing, "", usableAnalytes(crOK, cysOK)...)
		return out
	default:
		b, ok := p.band(age)
		if !ok {
			code := ReasonAgeBelowRange
			if len(p.Bands) > 0 && age >= p.Bands[0].MinAge {
				code = ReasonAgeAboveRange
			}
			refuseAnalytes(code, "", usableAnalytes(crOK, cysOK)...)
			return out
		}
		primary := ""
		switch {
		case crOK && cysOK:
			primary = b.PrimaryWhenBoth
			if primary == "" {
				primary = b.Combined
			}
			if primary == "" {
				primary = b.Creatinine
			}
		case crOK:
			primary = b.Creatinine
		case cysOK:
			primary = b.CystatinC
		}
		add := func(id string, when bool) {
			if id != "" && when {
				jobs = append(jobs, job{id: id, primary: id == primary})
			}
		}
		add(b.Creatinine, crOK)
		add(b.CystatinC, cysOK)
		add(b.Combined, crOK && cysOK)
		for _, id := range b.Extra {
			if e, ok := c.latest(req, id); ok && c.hasInputs(e, in) {
				add(id, true)
			}
		}
		if len(jobs) == 0 && (crOK || cysOK) {
			refuseAnalytes(ReasonNoEquation, "", usableAnalytes(crOK, cysOK)...)
		}
	}

	for _, j := range jobs {
		e, ok := c.latest(req, j.id)
		if !ok {
			out.Refusals = append(out.Refusals, Refusal{Code: ReasonEquationUnknown, Message: ReasonEquationUnknown.Describe(), Equation: j.id})
			continue
		}
		refuse := func(code Reason) {
			uses := e.Uses()
			n := len(out.Refusals)
			refuseAnalytes(code, e.ID, uses...)
			if len(out.Refusals) == n {
				out.Refusals = append(out.Refusals, Refusal{Code: code, Message: code.Describe(), Equation: e.ID})
			}
		}
		if missing := c.missing(e, in, vals); missing != "" {
			// A refused input already carries its own refusal.
			if !j.explicit && missing != ReasonHeightMissing {
				continue
			}
			refuse(missing)
			continue
		}
		if !ageOK {
			refuse(ReasonAgeMissing)
			continue
		}
		if age < e.MinAge {
			refuse(ReasonAgeBelowRange)
			continue
		}
		if e.MaxAge > 0 && age >= e.MaxAge {
			refuse(ReasonAgeAboveRange)
			continue
		}
		sexes := []Sex{req.Sex}
		assumed := false
		if e.Needs.Has(NeedSex) && req.Sex == SexUnknown {
			if p.SexUnknown != SexRuleBoth {
				refuse(ReasonSexUnknown)
				continue
			}
			sexes, assumed = []Sex{SexFemale, SexMale}, true
		}
		for _, s := range sexes {
			ein := in
			ein.Sex = s
			r, err := c.compute(p, e, ein)
			if err != nil {
				refuse(ReasonComputation)
				continue
			}
			r.Primary = j.primary
			if assumed {
				r.AssumedSex = s.String()
				r.Comments = append([]string{fmt.Sprintf("Sex is not recorded as female or male: this value is calculated as if %s.", s)}, r.Comments...)
			}
			out.Results = append(out.Results, r)
		}
	}
	// When the policy's primary equation was refused (a child without
	// height has no creatinine result but may have a cystatin C one), the
	// first value computed is the primary one, so that a worksheet and a
	// report show the same value.
	hasPrimary := false
	for _, r := range out.Results {
		hasPrimary = hasPrimary || r.Primary
	}
	if !hasPrimary && len(out.Results) > 0 {
		first := out.Results[0].Equation
		for i := range out.Results {
			out.Results[i].Primary = out.Results[i].Equation == first
		}
	}
	return out
}

func usableAnalytes(cr, cys bool) []Analyte {
	var a []Analyte
	if cr {
		a = append(a, Creatinine)
	}
	if cys {
		a = append(a, CystatinC)
	}
	return a
}

func (c *Calculator) latest(req Request, id string) (Equation, bool) {
	if v, ok := req.Pin[id]; ok {
		return c.reg.Get(id, v)
	}
	return c.reg.Latest(id)
}

func (c *Calculator) hasInputs(e Equation, in Inputs) bool {
	return c.missing(e, in, nil) == ""
}

// missing returns the reason an equation's inputs are incomplete, or "".
func (c *Calculator) missing(e Equation, in Inputs, _ map[Analyte]*usable) Reason {
	n := e.Needs
	switch {
	case n.Has(NeedCreatinine) && in.CreatinineMgDL <= 0,
		n.Has(NeedCystatinC) && in.CystatinCMgL <= 0,
		n.Has(NeedWeight) && in.WeightKG <= 0,
		n.Has(NeedTimedUrine) && (in.UrineCreatinineMgDL <= 0 || in.UrineVolumeML <= 0 || in.CollectionMin <= 0):
		return ReasonInputMissing
	case n.Has(NeedHeight) && in.HeightCM <= 0:
		return ReasonHeightMissing
	}
	return ""
}

// prepare parses, converts, calibrates and checks one measurement.
func (c *Calculator) prepare(req Request, m Measurement) (InputUse, float64, Reason) {
	p := req.Policy
	use := InputUse{
		Analyte: m.Analyte, SourceID: m.SourceID, ValueText: m.ValueText, Unit: m.Unit,
		Method: m.Method, Instrument: m.Instrument, ReagentLot: m.ReagentLot,
		UsedUnit: CanonicalUnit(m.Analyte),
	}
	if use.UsedUnit == "" {
		return use, 0, ReasonUnitUnknown
	}
	v, reason := ParseValue(m.ValueText)
	if reason != "" {
		return use, 0, reason
	}
	canon, factor, err := ToCanonical(m.Analyte, v, m.Unit)
	switch {
	case errors.Is(err, ErrNotFinite):
		return use, 0, ReasonValueImplausible
	case err != nil:
		return use, 0, ReasonUnitUnknown
	}
	if factor != 1 {
		use.Steps = append(use.Steps, step("convert to "+use.UsedUnit, canon, "%s %s × %.6g", m.ValueText, m.Unit, factor))
	}
	rng := p.plausible(m.Analyte)
	if !rng.Contains(canon) {
		return use, 0, ReasonValueImplausible
	}
	used := canon
	if m.Analyte == Creatinine || m.Analyte == CystatinC {
		rule, ok, ambiguous := findCalibration(req.Calibrations, m, req.CollectedAt)
		switch {
		case ambiguous:
			return use, 0, ReasonCalibrationAmbiguous
		case ok:
			use.Calibration, use.CalibrationV = rule.ID, rule.Version
			t := rule.Traceable
			use.Traceable = &t
			inRule, err := FromCanonical(m.Analyte, canon, rule.Unit)
			if err != nil {
				return use, 0, ReasonUnitUnknown
			}
			cal := rule.Slope*inRule + rule.Intercept
			back, _, err := ToCanonical(m.Analyte, cal, rule.Unit)
			if err != nil {
				return use, 0, ReasonUnitUnknown
			}
			use.Steps = append(use.Steps, step("calibration "+rule.ID+" v"+rule.Version, cal,
				"%g × %.6g %s + %g", rule.Slope, inRule, rule.Unit, rule.Intercept))
			if back != cal {
				use.Steps = append(use.Steps, step("calibrated in "+use.UsedUnit, back, "%.6g %s → %s", cal, rule.Unit, use.UsedUnit))
			}
			used = back
			if !rng.Contains(used) {
				use.Used = used
				return use, 0, ReasonValueImplausible
			}
		}
		if p.RequireTraceable && (use.Traceable == nil || !*use.Traceable) {
			use.Used = used
			return use, 0, ReasonNotTraceable
		}
	}
	use.Used = used
	return use, used, ""
}

// compute runs one equation and applies the reporting policy.
func (c *Calculator) compute(p Policy, e Equation, in Inputs) (Result, error) {
	v, steps, err := e.Compute(in)
	if err != nil {
		return Result{}, fmt.Errorf("calc: %s: %w", e.ID, err)
	}
	if math.IsNaN(v) || math.IsInf(v, 0) || v <= 0 {
		return Result{}, fmt.Errorf("calc: %s: %w", e.ID, errInput)
	}
	code, name := p.loinc(e)
	r := Result{
		Equation: e.ID, EquationVersion: e.Version, EquationName: e.Name,
		LOINC: code, LOINCName: name, Uses: e.Uses(), Inputs: e.Inputs(), AgeYears: in.AgeYears,
		Steps: steps, Exact: v, Unit: e.Unit,
	}
	rounded := roundTo(v, p.Decimals)
	r.Reported = strconv.FormatFloat(rounded, 'f', p.Decimals, 64)
	// Caps apply to eGFR (indexed) only: a clearance in mL/min above the
	// cap (augmented clearance) matters for drug dosing.
	if p.CapAbove > 0 && rounded > p.CapAbove && e.Unit == UnitIndexed {
		r.Reported = ">" + strconv.FormatFloat(p.CapAbove, 'f', -1, 64)
		r.Capped = true
	}
	if e.Unit == UnitIndexed {
		r.Category = Category(rounded)
	}
	if in.HeightCM > 0 && in.WeightKG > 0 && (e.Unit == UnitIndexed && p.NonIndexed || e.Unit == UnitNotIndexed && p.IndexClearance) {
		method := p.BSAMethod
		if method == "" {
			method = "dubois"
		}
		if bsa, err := BSA(BSAMethod(method), in.HeightCM, in.WeightKG); err == nil {
			r.BSA, r.BSAMethod = bsa, method
			bsaStep := step("BSA ("+method+")", bsa, "height %g cm, weight %g kg", in.HeightCM, in.WeightKG)
			if e.Unit == UnitIndexed {
				r.NonIndexed = Deindex(v, bsa)
				r.Steps = append(r.Steps, bsaStep, step("non-indexed (mL/min)", r.NonIndexed, "%.6g × %.6g / 1.73", v, bsa))
				r.Comments = append(r.Comments, fmt.Sprintf("Not indexed to body surface area (BSA %.2f m², %s): %s mL/min.",
					bsa, method, strconv.FormatFloat(roundTo(r.NonIndexed, p.Decimals), 'f', p.Decimals, 64)))
			} else {
				r.Indexed = Index(v, bsa)
				r.Steps = append(r.Steps, bsaStep, step("per 1.73 m² (mL/min/1.73 m²)", r.Indexed, "%.6g × 1.73 / %.6g", v, bsa))
				r.Comments = append(r.Comments, fmt.Sprintf("Per 1.73 m² of body surface area (BSA %.2f m², %s): %s mL/min/1.73 m².",
					bsa, method, strconv.FormatFloat(roundTo(r.Indexed, p.Decimals), 'f', p.Decimals, 64)))
			}
		}
	}
	r.Comments = append(r.Comments, p.Cautions...)
	return r, nil
}

// roundTo rounds half away from zero to d decimals (common practice for
// reporting; math.Round semantics).
func roundTo(v float64, d int) float64 {
	s := math.Pow(10, float64(d))
	return math.Round(v*s) / s
}
