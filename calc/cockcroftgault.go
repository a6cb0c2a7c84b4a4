package calc

import "math"

// cockcroftGault is the Cockcroft-Gault estimate of creatinine clearance.
//
// Source: Cockcroft DW, Gault MH. Prediction of creatinine clearance from
// serum creatinine. Nephron. 1976;16(1):31-41. doi:10.1159/000180580.
//
//	CrCl = (140 − age) × weight / (72 × Scr) × 0.85 [female]
//
// age in years, weight in kg (the body weight as received; the paper used
// actual body weight, and any adjusted or ideal weight is a local policy
// outside this equation), Scr in mg/dL. The result is a clearance in mL/min,
// not indexed to body surface area: it is the value drug-dosing tables
// expect. The paper derived the formula in adults aged 18 to 92; the
// equation is meaningless from age 140, where it is refused.
//
// The paper predates IDMS-traceable creatinine; the laboratory's standardised
// result is used as received (common practice).
//
// LOINC 35591-7 is "Creatinine renal clearance predicted by Cockcroft-Gault
// formula" (checked against LOINC table extracts, not the LOINC site).
func cockcroftGault() Equation {
	return Equation{
		ID:        "cockcroft-gault",
		Version:   "1",
		Name:      "Cockcroft-Gault creatinine clearance",
		Citation:  "Cockcroft DW, Gault MH. Nephron 1976;16:31-41",
		LOINC:     "35591-7",
		LOINCName: "Creatinine renal clearance predicted by Cockcroft-Gault formula",
		Unit:      UnitNotIndexed,
		MinAge:    18,
		Needs:     NeedCreatinine | NeedWeight | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			var sexFactor float64
			switch in.Sex {
			case SexFemale:
				sexFactor = 0.85
			case SexMale:
				sexFactor = 1
			default:
				return 0, nil, errInput // the policy resolves unknown sex before calling
			}
			if !(in.CreatinineMgDL > 0) || !(in.WeightKG > 0) || !(in.AgeYears < 140) {
				return 0, nil, errInput
			}
			ageTerm := 140 - in.AgeYears
			num := ageTerm * in.WeightKG
			den := 72 * in.CreatinineMgDL
			v := num / den * sexFactor
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return 0, nil, errInput
			}
			return v, []Step{
				step("140 − age", ageTerm, "140 - %g", in.AgeYears),
				step("(140 − age) × weight", num, "%.6g × %g kg", ageTerm, in.WeightKG),
				step("72 × Scr", den, "72 × %g mg/dL", in.CreatinineMgDL),
				step("sex factor", sexFactor, "%g (%s)", sexFactor, in.Sex),
				step("CrCl", v, "%.6g / %.6g × %g", num, den, sexFactor),
			}, nil
		},
	}
}
