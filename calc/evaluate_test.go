package calc

import (
	"encoding/json"
	"fmt"
	"math"
	"strconv"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
)

func ptr[T any](v T) *T { return &v }

func preset(t testing.TB, name string) Policy {
	t.Helper()
	p, err := Preset(name)
	require.NoError(t, err)
	require.NoError(t, p.Validate(Builtin()))
	return p
}

func cr(v, unit string) Measurement {
	return Measurement{Analyte: Creatinine, ValueText: v, Unit: unit, SourceID: "cr"}
}

func cys(v string) Measurement {
	return Measurement{Analyte: CystatinC, ValueText: v, Unit: "mg/L", SourceID: "cys"}
}

func height(v string) Measurement {
	return Measurement{Analyte: Height, ValueText: v, Unit: "cm", SourceID: "ht"}
}

func equations(o Outcome) []string {
	var ids []string
	for _, r := range o.Results {
		ids = append(ids, r.Equation)
	}
	return ids
}

func primary(t *testing.T, o Outcome) Result {
	t.Helper()
	for _, r := range o.Results {
		if r.Primary {
			return r
		}
	}
	t.Fatalf("no primary result in %+v", o)
	return Result{}
}

func codes(o Outcome) []Reason {
	var c []Reason
	for _, r := range o.Refusals {
		c = append(c, r.Code)
	}
	return c
}

func TestPresetsValidate(t *testing.T) {
	for _, n := range PresetNames() {
		preset(t, n)
	}
	_, err := Preset("nope")
	require.ErrorContains(t, err, "unknown policy preset")
}

func TestPolicyChoosesEquations(t *testing.T) {
	calc := NewCalculator(Builtin())
	tests := []struct {
		name      string
		policy    string
		age       float64
		sex       Sex
		ms        []Measurement
		want      []string
		primary   string
		refusals  []Reason
		noResults bool
	}{
		{"adult creatinine", "nkf-asn-2021", 50, SexFemale, []Measurement{cr("1.0", "mg/dL")},
			[]string{"ckd-epi-2021-cr"}, "ckd-epi-2021-cr", nil, false},
		{"adult both: combined is primary", "nkf-asn-2021", 50, SexMale, []Measurement{cr("1.0", "mg/dL"), cys("1.0")},
			[]string{"ckd-epi-2021-cr", "ckd-epi-2012-cys", "ckd-epi-2021-crcys"}, "ckd-epi-2021-crcys", nil, false},
		{"adult cystatin C only", "nkf-asn-2021", 50, SexMale, []Measurement{cys("1.0")},
			[]string{"ckd-epi-2012-cys"}, "ckd-epi-2012-cys", nil, false},
		{"child with height", "nkf-asn-2021", 11, SexMale, []Measurement{cr("0.9", "mg/dL"), height("120")},
			[]string{"ckid-u25-cr"}, "ckid-u25-cr", nil, false},
		{"child without height: no eGFR from creatinine", "nkf-asn-2021", 11, SexMale, []Measurement{cr("0.9", "mg/dL")},
			nil, "", []Reason{ReasonHeightMissing}, true},
		{"child without height, cystatin C still computes", "nkf-asn-2021", 11, SexMale, []Measurement{cr("0.9", "mg/dL"), cys("1.3")},
			[]string{"ckid-u25-cys"}, "ckid-u25-cys", []Reason{ReasonHeightMissing, ReasonHeightMissing, ReasonHeightMissing}, false}, // ckid-u25-cr on creatinine; ckid-u25-crcys on both inputs
		{"infant below every band", "nkf-asn-2021", 0.5, SexMale, []Measurement{cr("0.3", "mg/dL"), height("65")},
			nil, "", []Reason{ReasonAgeBelowRange}, true},
		{"NICE adult creatinine: CKD-EPI 2009", "nice-2021", 60, SexMale, []Measurement{cr("1.1", "mg/dL")},
			[]string{"ckd-epi-2009-cr"}, "ckd-epi-2009-cr", nil, false},
		{"NICE both: cystatin C is primary", "nice-2021", 60, SexMale, []Measurement{cr("1.1", "mg/dL"), cys("1.1")},
			[]string{"ckd-epi-2009-cr", "ckd-epi-2012-cys"}, "ckd-epi-2012-cys", nil, false},
		{"EKFC child needs no height", "ekfc", 11, SexFemale, []Measurement{cr("0.6", "mg/dL")},
			[]string{"ekfc-cr"}, "ekfc-cr", nil, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			o := calc.Evaluate(Request{AgeYears: ptr(tc.age), Sex: tc.sex, Measurements: tc.ms, Policy: preset(t, tc.policy)})
			require.ElementsMatch(t, tc.want, equations(o))
			if tc.primary != "" {
				require.Equal(t, tc.primary, primary(t, o).Equation)
			}
			if tc.noResults {
				require.Empty(t, o.Results)
			}
			if tc.refusals != nil {
				require.Equal(t, tc.refusals, codes(o))
			} else {
				require.Empty(t, o.Refusals)
			}
		})
	}
}

func TestRefusedInputs(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	tests := []struct {
		name string
		m    Measurement
		want Reason
	}{
		{"censored below", cr("<0.2", "mg/dL"), ReasonValueCensored},
		{"censored above", cr(">20", "mg/dL"), ReasonValueCensored},
		{"text", cr("haemolysed", "mg/dL"), ReasonValueNotNumeric},
		{"unknown unit", cr("1.0", "mg%"), ReasonUnitUnknown},
		{"blank unit", cr("1.0", ""), ReasonUnitUnknown},
		{"umol/L value labelled mg/dL", cr("85", "mg/dL"), ReasonValueImplausible},
		{"mg/dL value labelled umol/L", cr("0.9", "umol/L"), ReasonValueImplausible},
		{"blank value", cr("", "mg/dL"), ReasonInputMissing},
		{"negative", cr("-1", "mg/dL"), ReasonValueImplausible},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Measurements: []Measurement{tc.m}, Policy: p})
			require.Empty(t, o.Results)
			require.Equal(t, []Reason{tc.want}, codes(o))
			require.Equal(t, "cr", o.Refusals[0].SourceID)
			require.False(t, o.Inputs[0].Accepted)
			require.NotEmpty(t, o.Refusals[0].Message)
		})
	}
}

func TestUnitsGiveTheSameResult(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	var got []float64
	// 1.0 mg/dL = 88.4 µmol/L = 0.0884 mmol/L with the chosen factor 88.4.
	for _, m := range []Measurement{cr("1.0", "mg/dL"), cr("88.4", "umol/L"), cr("88.4", "µmol/L"), cr("88.4", "μmol/L"), cr("0.0884", "mmol/L")} {
		o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexFemale, Measurements: []Measurement{m}, Policy: p})
		require.Len(t, o.Results, 1, m.Unit)
		got = append(got, o.Results[0].Exact)
	}
	for _, v := range got[1:] {
		require.InDelta(t, got[0], v, 1e-9)
	}
}

func TestAgeFromBirthDateAndCollection(t *testing.T) {
	d := func(s string) time.Time {
		v, err := time.Parse("2006-01-02", s)
		require.NoError(t, err)
		return v
	}
	tests := []struct {
		birth, at string
		completed int
		decimal   float64
		ok        bool
	}{
		{"1970-06-15", "2026-06-14", 55, 55 + 364.0/365, true},
		{"1970-06-15", "2026-06-15", 56, 56, true},
		{"2016-02-29", "2026-02-28", 9, 9 + 364.0/365, true}, // birthday reached on 1 March in common years
		{"2016-02-29", "2026-03-01", 10, 10, true},
		{"2020-01-01", "2019-12-31", 0, 0, false}, // collection before birth
	}
	for _, tc := range tests {
		a, ok := AgeAt(d(tc.birth), d(tc.at))
		require.Equal(t, tc.ok, ok, tc.birth)
		if ok {
			require.Equal(t, tc.completed, a.Completed, tc.birth)
			require.InDelta(t, tc.decimal, a.Decimal, 1e-9, tc.birth)
		}
	}
	_, ok := AgeAt(time.Time{}, d("2026-01-01"))
	require.False(t, ok)

	// The collection date in its own time zone counts, not UTC: collected
	// 00:30 on the 15th at +02:00 is still the 15th (birthday reached).
	loc := time.FixedZone("lab", 2*3600)
	a, ok := AgeAt(d("1970-06-15"), time.Date(2026, 6, 15, 0, 30, 0, 0, loc))
	require.True(t, ok)
	require.Equal(t, 56, a.Completed)
}

func TestRequestAgeAndBasis(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	birth := time.Date(1970, 6, 15, 0, 0, 0, 0, time.UTC)
	at := time.Date(2026, 6, 14, 9, 0, 0, 0, time.UTC)
	o := calc.Evaluate(Request{BirthDate: birth, CollectedAt: at, Sex: SexFemale, Measurements: []Measurement{cr("1.0", "mg/dL")}, Policy: p})
	require.Equal(t, 55.0, *o.AgeYears, "adults use completed years")
	require.Len(t, o.Results, 1)

	child := time.Date(2015, 1, 1, 0, 0, 0, 0, time.UTC)
	o = calc.Evaluate(Request{BirthDate: child, CollectedAt: at, Sex: SexFemale, Measurements: []Measurement{cr("0.6", "mg/dL"), height("140")}, Policy: p})
	require.Greater(t, *o.AgeYears, 11.0)
	require.Less(t, *o.AgeYears, 12.0, "children use decimal age")

	o = calc.Evaluate(Request{CollectedAt: at, Sex: SexFemale, Measurements: []Measurement{cr("1.0", "mg/dL")}, Policy: p})
	require.Empty(t, o.Results)
	require.Equal(t, []Reason{ReasonAgeMissing}, codes(o))
}

func TestSexUnknown(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	req := Request{AgeYears: ptr(50.0), Sex: SexUnknown, Measurements: []Measurement{cr("1.0", "mg/dL")}, Policy: p}
	o := calc.Evaluate(req)
	require.Empty(t, o.Results)
	require.Equal(t, []Reason{ReasonSexUnknown}, codes(o))

	req.Policy.SexUnknown = SexRuleBoth
	o = calc.Evaluate(req)
	require.Len(t, o.Results, 2)
	require.Equal(t, "female", o.Results[0].AssumedSex)
	require.Equal(t, "male", o.Results[1].AssumedSex)
	require.Contains(t, o.Results[0].Comments[0], "as if female")
	require.Contains(t, o.Results[1].Comments[0], "as if male")
	require.NotEqual(t, o.Results[0].Exact, o.Results[1].Exact)
}

func TestCalibration(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	at := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	m := Measurement{Analyte: Creatinine, ValueText: "1.00", Unit: "mg/dL", Method: "ENZ", Instrument: "A1", ReagentLot: "L7", SourceID: "cr"}
	generic := CalibrationRule{ID: "cr-enz", Version: "2", Analyte: Creatinine, Method: "ENZ", Slope: 0.95, Intercept: 0.02, Unit: "mg/dL", Traceable: true}
	lot := CalibrationRule{ID: "cr-enz-l7", Version: "1", Analyte: Creatinine, Method: "ENZ", ReagentLot: "L7", Slope: 1, Intercept: -0.05, Unit: "mg/dL", Traceable: true}
	umol := CalibrationRule{ID: "cr-umol", Version: "1", Analyte: Creatinine, Method: "ENZ", Instrument: "A1", Slope: 1, Intercept: -4.42, Unit: "umol/L", Traceable: true}
	for _, r := range []CalibrationRule{generic, lot, umol} {
		require.NoError(t, r.Validate())
	}

	used := func(rules []CalibrationRule, m Measurement, p Policy) (InputUse, Outcome) {
		o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, CollectedAt: at, Measurements: []Measurement{m}, Policy: p, Calibrations: rules})
		return o.Inputs[0], o
	}

	u, _ := used([]CalibrationRule{generic}, m, p)
	require.Equal(t, "cr-enz", u.Calibration)
	require.Equal(t, "2", u.CalibrationV)
	require.InDelta(t, 0.97, u.Used, 1e-12) // 0.95 × 1.00 + 0.02
	require.True(t, u.Accepted)

	// The lot-specific rule is more specific than the method-wide one.
	u, _ = used([]CalibrationRule{generic, lot}, m, p)
	require.Equal(t, "cr-enz-l7", u.Calibration)
	require.InDelta(t, 0.95, u.Used, 1e-12)

	// A rule stated in µmol/L: 88.4 − 4.42 = 83.98 µmol/L = 0.95 mg/dL.
	u, _ = used([]CalibrationRule{umol}, m, p)
	require.InDelta(t, 0.95, u.Used, 1e-12)

	// Two equally specific rules: refused.
	_, o := used([]CalibrationRule{lot, umol}, m, p)
	require.Equal(t, []Reason{ReasonCalibrationAmbiguous}, codes(o))

	// Effective dates: a rule that ended before collection does not apply.
	ended := generic
	ended.EffectiveTo = at
	u, _ = used([]CalibrationRule{ended}, m, p)
	require.Empty(t, u.Calibration)
	require.InDelta(t, 1.0, u.Used, 1e-12)
	future := generic
	future.EffectiveFrom = at.Add(time.Second)
	u, _ = used([]CalibrationRule{future}, m, p)
	require.Empty(t, u.Calibration)

	// A policy that requires traceability refuses an assay with no rule or
	// a non-traceable rule.
	strict := p
	strict.RequireTraceable = true
	_, o = used(nil, m, strict)
	require.Equal(t, []Reason{ReasonNotTraceable}, codes(o))
	jaffe := generic
	jaffe.Traceable = false
	_, o = used([]CalibrationRule{jaffe}, m, strict)
	require.Equal(t, []Reason{ReasonNotTraceable}, codes(o))
	_, o = used([]CalibrationRule{generic}, m, strict)
	require.Empty(t, o.Refusals)
	require.Len(t, o.Results, 1)

	bad := generic
	bad.Slope = 0
	require.Error(t, bad.Validate())
	bad = generic
	bad.Unit = "furlongs"
	require.Error(t, bad.Validate())
}

func TestReportingCapAndCategory(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nice-2021")
	o := calc.Evaluate(Request{AgeYears: ptr(30.0), Sex: SexFemale, Measurements: []Measurement{cr("0.6", "mg/dL")}, Policy: p})
	r := primary(t, o)
	require.Greater(t, r.Exact, 90.0)
	require.Equal(t, ">90", r.Reported)
	require.True(t, r.Capped)
	require.Equal(t, "G1", r.Category)
	require.Equal(t, p.Cautions, r.Comments)

	o = calc.Evaluate(Request{AgeYears: ptr(70.0), Sex: SexMale, Measurements: []Measurement{cr("2.0", "mg/dL")}, Policy: p})
	r = primary(t, o)
	require.Equal(t, strconv.FormatFloat(math.Round(r.Exact), 'f', 0, 64), r.Reported)
	require.Equal(t, Category(math.Round(r.Exact)), r.Category)
	require.Equal(t, "62238-1", r.LOINC)
}

func TestKDIGOCategories(t *testing.T) {
	// KDIGO 2012 CKD guideline, Kidney Int Suppl 2013;3:1-150, Table 5.
	tests := map[float64]string{
		120: "G1", 90: "G1", 89: "G2", 60: "G2", 59: "G3a", 45: "G3a", 44: "G3b",
		30: "G3b", 29: "G4", 15: "G4", 14: "G5", 1: "G5",
	}
	for v, want := range tests {
		require.Equal(t, want, Category(v), v)
		require.NotEmpty(t, CategoryDescription(want))
	}
	// The category follows the reported (rounded) value: 59.6 reports as 60.
	require.Equal(t, "G2", Category(roundTo(59.6, 0)))
}

func TestExplicitEquation(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Equation: "mdrd-175", Measurements: []Measurement{cr("1.2", "mg/dL")}, Policy: p})
	require.Equal(t, []string{"mdrd-175"}, equations(o))
	require.True(t, o.Results[0].Primary)

	o = calc.Evaluate(Request{AgeYears: ptr(10.0), Sex: SexMale, Equation: "ckd-epi-2021-cr", Measurements: []Measurement{cr("0.6", "mg/dL")}, Policy: p})
	require.Empty(t, o.Results)
	require.Equal(t, []Reason{ReasonAgeBelowRange}, codes(o))

	o = calc.Evaluate(Request{AgeYears: ptr(10.0), Sex: SexMale, Equation: "ckid-u25-cr", Measurements: []Measurement{cr("0.6", "mg/dL")}, Policy: p})
	require.Equal(t, []Reason{ReasonHeightMissing}, codes(o))

	o = calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Equation: "no-such", Measurements: []Measurement{cr("1", "mg/dL")}, Policy: p})
	require.Equal(t, []Reason{ReasonEquationUnknown}, codes(o))
}

// A stored request (JSON) must recompute to exactly the same outcome: this is
// what the audit trail relies on.
func TestRequestRoundTripRecomputes(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	p.SexUnknown = SexRuleBoth
	req := Request{
		BirthDate: time.Date(1961, 2, 3, 0, 0, 0, 0, time.UTC), CollectedAt: time.Date(2026, 11, 30, 7, 45, 0, 0, time.FixedZone("", 3600)),
		Sex:          SexUnknown,
		Measurements: []Measurement{cr("97", "umol/L"), cys("1.21")},
		Policy:       p,
		Calibrations: []CalibrationRule{{ID: "r1", Version: "3", Analyte: CystatinC, Slope: 1.02, Intercept: -0.01, Unit: "mg/L", Traceable: true, EffectiveFrom: time.Date(2026, 1, 1, 0, 0, 0, 0, time.UTC)}},
	}
	want := calc.Evaluate(req)
	b, err := json.Marshal(req)
	require.NoError(t, err)
	var back Request
	require.NoError(t, json.Unmarshal(b, &back))
	got := calc.Evaluate(back)
	require.Equal(t, want, got)
	require.Len(t, got.Results, 6)
}

func TestPinnedVersion(t *testing.T) {
	old := ckdEPI2021Cr()
	old.Version = "0"
	old.Compute = func(in Inputs) (float64, []Step, error) { return 42, []Step{{Name: "eGFR", Value: 42}}, nil }
	reg, err := NewRegistry(old, ckdEPI2021Cr())
	require.NoError(t, err)
	calc := NewCalculator(reg)
	p := preset(t, "nkf-asn-2021")
	req := Request{AgeYears: ptr(50.0), Sex: SexMale, Equation: "ckd-epi-2021-cr", Measurements: []Measurement{cr("1", "mg/dL")}, Policy: p}
	require.NotEqual(t, 42.0, calc.Evaluate(req).Results[0].Exact)
	req.Pin = map[string]string{"ckd-epi-2021-cr": "0"}
	r := calc.Evaluate(req).Results[0]
	require.Equal(t, 42.0, r.Exact)
	require.Equal(t, "0", r.EquationVersion)

	_, err = NewRegistry(old, old)
	require.ErrorContains(t, err, "registered twice")
}

func TestEvaluateIsDeterministic(t *testing.T) {
	calc := NewCalculator(Builtin())
	req := Request{AgeYears: ptr(44.0), Sex: SexFemale, Measurements: []Measurement{cr("1.3", "mg/dL"), cys("1.4")}, Policy: preset(t, "nkf-asn-2021")}
	require.Equal(t, calc.Evaluate(req), calc.Evaluate(req))
}

func BenchmarkEvaluate(b *testing.B) {
	calc := NewCalculator(Builtin())
	p, _ := Preset("nkf-asn-2021")
	req := Request{
		BirthDate: time.Date(1961, 2, 3, 0, 0, 0, 0, time.UTC), CollectedAt: time.Date(2026, 11, 30, 7, 45, 0, 0, time.UTC),
		Sex: SexFemale, Measurements: []Measurement{cr("97", "umol/L"), cys("1.21")}, Policy: p,
	}
	b.ReportAllocs()
	for b.Loop() {
		calc.Evaluate(req)
	}
}

func TestEvaluateDuplicateAnalyte(t *testing.T) {
	calc := NewCalculator(Builtin())
	a, b := cr("1.0", "mg/dL"), cr("1.4", "mg/dL")
	b.SourceID = "cr2"
	o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Measurements: []Measurement{a, b}, Policy: preset(t, "nkf-asn-2021")})
	require.Empty(t, o.Results)
	require.Equal(t, []Reason{ReasonInputDuplicate, ReasonInputDuplicate}, codes(o))
}

// Whatever an equation returns, only finite positive values are reported.
func TestEvaluateNeverPrintsNonFinite(t *testing.T) {
	for _, bad := range []float64{math.NaN(), math.Inf(1), 0, -3} {
		e := ckdEPI2021Cr()
		e.Compute = func(Inputs) (float64, []Step, error) { return bad, nil, nil }
		reg, err := NewRegistry(e)
		require.NoError(t, err)
		p := preset(t, "nkf-asn-2021")
		o := NewCalculator(reg).Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Equation: e.ID, Measurements: []Measurement{cr("1", "mg/dL")}, Policy: p})
		require.Empty(t, o.Results, "%v", bad)
		require.Equal(t, []Reason{ReasonComputation}, codes(o))
	}
}

func TestHugeValueIsImplausibleNotUnknownUnit(t *testing.T) {
	calc := NewCalculator(Builtin())
	o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Measurements: []Measurement{cr("1e308", "mmol/L")}, Policy: preset(t, "nkf-asn-2021")})
	require.Equal(t, []Reason{ReasonValueImplausible}, codes(o))
}

func TestEveryReasonIsListedAndDescribed(t *testing.T) {
	seen := map[Reason]bool{}
	for _, r := range Reasons() {
		require.False(t, seen[r], "listed twice: %s", r)
		seen[r] = true
		require.NotEqual(t, Reason("").Describe(), r.Describe(), "no sentence for %s", r)
	}
	require.Len(t, seen, 16)
}

func TestBSAConversions(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nkf-asn-2021")
	ms := []Measurement{cr("1.0", "mg/dL"), height("180"), {Analyte: Weight, ValueText: "80", Unit: "kg"}}
	o := calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Measurements: ms, Policy: p})
	require.Zero(t, o.Results[0].NonIndexed, "off unless the policy asks")

	p.NonIndexed, p.BSAMethod = true, "mosteller"
	o = calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Measurements: ms, Policy: p})
	r := o.Results[0]
	// Mosteller: sqrt(180 × 80 / 3600) = 2 m² exactly (hand computation
	// from Mosteller, N Engl J Med 1987); de-indexed = eGFR × 2 / 1.73.
	require.InDelta(t, 2.0, r.BSA, 1e-12)
	require.InDelta(t, r.Exact*2/1.73, r.NonIndexed, 1e-9)
	require.Equal(t, r.NonIndexed, r.Steps[len(r.Steps)-1].Value)
	require.Contains(t, r.Comments, fmt.Sprintf("Not indexed to body surface area (BSA 2.00 m², mosteller): %.0f mL/min.", r.NonIndexed))

	// Measured clearance 100 mL/min per 1.73 m²: × 1.73 / 2.
	p.IndexClearance = true
	timed := append(ms, Measurement{Analyte: UrineCreatinine, ValueText: "100", Unit: "mg/dL"},
		Measurement{Analyte: UrineVolume, ValueText: "1440", Unit: "mL"},
		Measurement{Analyte: CollectionTime, ValueText: "24", Unit: "h"})
	o = calc.Evaluate(Request{AgeYears: ptr(50.0), Sex: SexMale, Equation: "crcl-timed-urine", Measurements: timed, Policy: p})
	require.Len(t, o.Results, 1)
	r = o.Results[0]
	// U×V/(P×t) = 100 × 1440 / (1.0 × 1440) = 100 mL/min (hand computation).
	require.InDelta(t, 100, r.Exact, 1e-9)
	require.InDelta(t, 86.5, r.Indexed, 1e-9)
	require.Contains(t, r.Comments, "Per 1.73 m² of body surface area (BSA 2.00 m², mosteller): 87 mL/min/1.73 m².")
	require.Empty(t, r.Category, "clearances in mL/min get no KDIGO category")
}

// A clearance in mL/min is never capped: augmented clearance matters for
// drug dosing.
func TestCapAppliesToEGFROnly(t *testing.T) {
	calc := NewCalculator(Builtin())
	p := preset(t, "nice-2021")
	ms := []Measurement{cr("0.5", "mg/dL"), {Analyte: UrineCreatinine, ValueText: "120", Unit: "mg/dL"},
		{Analyte: UrineVolume, ValueText: "1500", Unit: "mL"}, {Analyte: CollectionTime, ValueText: "24", Unit: "h"}}
	o := calc.Evaluate(Request{AgeYears: ptr(30.0), Sex: SexMale, Measurements: ms, Policy: p})
	got := map[string]Result{}
	for _, r := range o.Results {
		got[r.Equation] = r
	}
	require.Equal(t, ">90", got["ckd-epi-2009-cr"].Reported)
	// 120 × 1500 / (0.5 × 1440) = 250 mL/min (hand computation).
	require.Equal(t, "250", got["crcl-timed-urine"].Reported)
	require.False(t, got["crcl-timed-urine"].Capped)
}
