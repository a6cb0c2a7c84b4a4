package calc

import "math"

// mdrd175 is the IDMS-traceable 4-variable MDRD Study equation, without the
// race factor.
//
// Sources: Levey AS, Coresh J, Greene T, et al. Using standardized serum
// creatinine values in the Modification of Diet in Renal Disease Study
// equation for estimating glomerular filtration rate. Ann Intern Med.
// 2006;145(4):247-254. doi:10.7326/0003-4819-145-4-200608150-00004. Levey AS,
// Coresh J, Greene T, et al. Expressing the Modification of Diet in Renal
// Disease Study equation for estimating glomerular filtration rate with
// standardized serum creatinine values. Clin Chem. 2007;53(4):766-772 (volume
// and pages from memory).
//
//	eGFR = 175 × Scr^−1.154 × age^−0.203 × 0.742 [female]
//
// Scr in mg/dL (standardised, IDMS-traceable: 175 replaces the 186 of the
// original equation, which assumed the MDRD laboratory's calibration); used
// without the race factor (× 1.212); validated from age 18.
func mdrd175() Equation {
	return Equation{
		ID:        "mdrd-175",
		Version:   "1",
		Name:      "MDRD 4-variable, IDMS-traceable (175)",
		Citation:  "Levey AS et al. Ann Intern Med 2006;145:247-54",
		LOINC:     "77147-7",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine-based formula (MDRD)",
		Unit:      UnitIndexed,
		MinAge:    18,
		Needs:     NeedCreatinine | NeedSex,
		Compute: func(in Inputs) (float64, []Step, error) {
			// Compute is only called with its Needs present, but a wrong
			// value is worse than none: refuse rather than guess.
			if (in.Sex != SexFemale && in.Sex != SexMale) ||
				!(in.CreatinineMgDL > 0) || !(in.AgeYears > 0) {
				return 0, nil, errInput
			}
			sexFactor := 1.0
			if in.Sex == SexFemale {
				sexFactor = 0.742
			}
			scr := math.Pow(in.CreatinineMgDL, -1.154)
			age := math.Pow(in.AgeYears, -0.203)
			v := 175 * scr * age * sexFactor
			return v, []Step{
				step("Scr^−1.154", scr, "%g mg/dL ^ -1.154", in.CreatinineMgDL),
				step("age^−0.203", age, "%g ^ -0.203", in.AgeYears),
				step("sex factor", sexFactor, "%g (%s)", sexFactor, in.Sex),
				step("eGFR", v, "175 × %.6g × %.6g × %g", scr, age, sexFactor),
			}, nil
		},
	}
}
