package calc

import "math"

// ckdEPI2009Cr is the CKD-EPI 2009 creatinine equation without the race
// coefficient.
//
// Source: Levey AS, Stevens LA, Schmid CH, et al. A new equation to estimate
// glomerular filtration rate. Ann Intern Med. 2009;150(9):604-612.
// doi:10.7326/0003-4819-150-9-200905050-00006. Used without its race
// coefficient (× 1.159) as recommended by NICE guideline NG203, Chronic
// kidney disease: assessment and management (2021; summarised in BMJ
// 2021;374:n1992).
//
//	eGFR = 141 × min(Scr/κ, 1)^α × max(Scr/κ, 1)^−1.209 × 0.993^age × 1.018 [female]
//	κ = 0.7 (female), 0.9 (male); α = −0.329 (female), −0.411 (male)
//
// Scr in mg/dL (standardised, IDMS-traceable); validated from age 18.
//
// The paper also prints the equation split by sex and creatinine range, with
// the female constant rounded to 144 (= 141 × 1.018 = 143.538; from memory,
// and the split form with 144 is what the R package kidney.epi uses). This
// implementation uses the general form, 141 × 1.018, as the R packages nephro
// (CKDEpi.creat), epocakir (eGFR_adult_SCr) and egfr (egfr_ckdepi_cr_2009)
// do; calculators using 144 give female results 0.32% higher.
func ckdEPI2009Cr() Equation {
	return Equation{
		ID:        "ckd-epi-2009-cr",
		Version:   "1",
		Name:      "CKD-EPI 2009 creatinine (without race coefficient)",
		Citation:  "Levey AS et al. Ann Intern Med 2009;150:604-12",
		LOINC:     "62238-1",
		LOINCName: "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum, Plasma or Blood by Creatinine-based formula (CKD-EPI)",
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
			kappa, alpha, sexFactor := 0.9, -0.411, 1.0
			if in.Sex == SexFemale {
				kappa, alpha, sexFactor = 0.7, -0.329, 1.018
			}
			ratio := in.CreatinineMgDL / kappa
			lo := math.Pow(math.Min(ratio, 1), alpha)
			hi := math.Pow(math.Max(ratio, 1), -1.209)
			age := math.Pow(0.993, in.AgeYears)
			v := 141 * lo * hi * age * sexFactor
			return v, []Step{
				step("Scr/κ", ratio, "%g mg/dL / %g", in.CreatinineMgDL, kappa),
				step("min(Scr/κ,1)^α", lo, "min(%.6g,1)^%g", ratio, alpha),
				step("max(Scr/κ,1)^−1.209", hi, "max(%.6g,1)^-1.209", ratio),
				step("0.993^age", age, "0.993^%g", in.AgeYears),
				step("sex factor", sexFactor, "%g (%s)", sexFactor, in.Sex),
				step("eGFR", v, "141 × %.6g × %.6g × %.6g × %g", lo, hi, age, sexFactor),
			}, nil
		},
	}
}
